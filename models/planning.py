"""Planning: how precise will a campaign's bias-corrected lift be, and what would sharpen it?

A normal approximation of the full model's structure, pure NumPy/SciPy (no sampler).
On the log-odds scale the corrected lift estimate of one campaign is

    target estimate - bias estimate,   Var = V_sampling + residual_sd^2 + V_bias

* ``V_sampling`` is the Wald variance of the seen-versus-unseen log odds ratio
  of the target, ``1/(n_s p_s q_s) + 1/(n_u p_u q_u)``: it falls as 1/users.
* ``residual_sd^2`` is the target's own unknown bias, which no placebo can
  reveal (the data see only lift + residual): it does not fall with users.
* ``V_bias`` is what is left unknown of the campaign's bias after its ``m``
  placebo outcomes: ``1 / (1/bias_sd^2 + m / (residual_sd^2 + se_p^2))``, plus
  the uncertainty of the portfolio's mean bias, which pooling across campaigns
  cannot average away.

Pooling across ``J`` campaigns with true lifts spread ``lift_sd`` then shrinks
the variance as in the normal-normal model (Gelman et al., BDA3 section 5.4):
``V (1 - B) + B^2 (V + lift_sd^2) / J`` with ``B = V / (V + lift_sd^2)``.

So the interval has a floor: as users grow, ``V_sampling`` and ``se_p`` go to
zero, and the variance goes to ``residual_sd^2 + 1/(1/bias_sd^2 + m/residual_sd^2)``
(before pooling); more placebo outcomes lower it, more users do not
(docs/planning.md).

The probability that the interval excludes zero uses the difference of rates
with the null variance at the critical value and the alternative variance for
the spread (the Fleiss formula), so that with the bias terms switched off the
users needed are the standard two-proportion sample size.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize, stats
from scipy.special import expit, logit

from liftpool.data_prep.errors import ConfigError
from liftpool.data_prep.options import OptionsMixin

__all__ = ["PlanInputs", "Plan", "variance_parts", "plan", "width_curve", "plan_inputs_from_fit",
           "simulate_plan", "PLAN_ASSUMPTIONS", "excess_width", "tests_for_excess_width"]

#: What every plan assumes (printed with it).
PLAN_ASSUMPTIONS = (
    "A normal approximation: the variance components are treated as known, at the values given "
    "(or a fit's posterior means); with few placebos or campaigns the real interval is wider.",
    "The campaign's lift is the portfolio's typical lift (pooling pulls an unusual campaign toward "
    "the others, which this plan ignores).",
    "Placebo outcomes convert at the rate given for them (by default the target's rate) and have the "
    "same seen and unseen users as the target.",
    "One cell: stratifying on covariates changes the bias, not the sampling variance, to first order.",
    "This plans an observational estimate, not a randomized test; the floor is what the placebo "
    "outcomes cannot reveal about the target's own bias.",
)


@dataclass(frozen=True)
class PlanInputs(OptionsMixin):
    """What a plan needs (scales of the bias and lift terms on the log-odds scale, as in the model).

    Parameters
    ----------
    users : float
        Exposed users of the campaign (seen + unseen).
    seen_share : float
        Share of exposed users with at least one viewable impression.
    baseline_rate : float
        Target conversion rate of unseen users.
    lift : float
        Expected relative lift among seen users (0.1 = +10%).
    placebos : int
        Placebo outcomes per campaign.
    campaigns : int
        Campaigns pooled (this one included).
    level : float
        Credible-interval level.
    placebo_rate : float or None
        Conversion rate of a placebo outcome among unseen users (default: ``baseline_rate``).
    bias_mean, bias_sd : float
        Mean and spread across campaigns of the campaign bias (log odds).
    residual_sd : float
        Spread of one outcome's own bias around its campaign's bias (log odds).
    lift_sd : float
        Spread of the true lifts across campaigns (log odds); used when ``campaigns > 1``.
    excess_sd : float
        Spread across campaigns of the target's excess bias over its placebos' (log odds): what
        randomized tests measure (docs/model.md).
    test_se : float
        Standard error of one randomized test's lift among the exposed, on the log scale (about the
        relative standard error: 0.05 for +-5%).
    excess_mean_scale : float
        Prior scale of the excess bias's mean (the model's ``excess_mean_scale``).
    bias : bool
        False switches the bias terms off (a randomized test's arithmetic: then the plan is the
        standard two-proportion calculation).
    source : str
        Where the variance components come from ("assumed" or a fit's id).
    """

    users: float = 100_000
    seen_share: float = 0.5
    baseline_rate: float = 0.01
    lift: float = 0.10
    placebos: int = 4
    campaigns: int = 1
    level: float = 0.9
    placebo_rate: float | None = None
    bias_mean: float = 0.0
    bias_sd: float = 0.10
    residual_sd: float = 0.05
    lift_sd: float = 0.10
    excess_sd: float = 0.05
    test_se: float = 0.05
    excess_mean_scale: float = 0.25
    bias: bool = True
    source: str = "assumed"
    extra: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.extra:
            raise ConfigError.unknown_keys(self.extra, self.option_names())
        checks = [
            ("users", self.users > 0, "a positive number of exposed users, e.g. 100000"),
            ("seen_share", 0 < self.seen_share < 1, "a share strictly between 0 and 1, e.g. 0.5"),
            ("baseline_rate", 0 < self.baseline_rate < 1, "a rate strictly between 0 and 1, e.g. 0.01"),
            ("lift", self.lift > -1, "a relative lift above -1, e.g. 0.1 for +10%"),
            ("placebos", int(self.placebos) == self.placebos and self.placebos >= 0, "a whole number >= 0"),
            ("campaigns", int(self.campaigns) == self.campaigns and self.campaigns >= 1, "a whole number >= 1"),
            ("level", 0 < self.level < 1, "e.g. 0.9 for 90% intervals"),
            ("bias_sd", self.bias_sd >= 0, "a spread >= 0 (log odds)"),
            ("residual_sd", self.residual_sd >= 0, "a spread >= 0 (log odds)"),
            ("lift_sd", self.lift_sd >= 0, "a spread >= 0 (log odds)"),
            ("excess_sd", self.excess_sd >= 0, "a spread >= 0 (log odds)"),
            ("test_se", self.test_se > 0, "a positive standard error (log scale), e.g. 0.05"),
            ("excess_mean_scale", self.excess_mean_scale > 0, "a positive prior scale, e.g. 0.25"),
        ]
        if self.placebo_rate is not None:
            checks.append(("placebo_rate", 0 < self.placebo_rate < 1, "a rate strictly between 0 and 1"))
        for name, ok, fix in checks:
            if not ok:
                raise ConfigError(problem=f"plan input '{name}' is out of range: {getattr(self, name)!r}",
                                  fix=f"give {name} as {fix}")
        if self.bias and self.placebos == 0:
            raise ConfigError(problem="a bias-corrected plan needs at least one placebo outcome per campaign",
                              fix="give placebos >= 1, or switch the bias terms off to plan a randomized test")
        p_seen = self.rates()["seen"]
        if not p_seen < 1:
            raise ConfigError(problem=f"the seen users' rate with the ad would be {p_seen:.3g} (not below 1)",
                              fix="lower the lift or the baseline rate")

    def rates(self) -> dict[str, float]:
        """Target rates: unseen, seen without the ad (bias only) and seen with the ad."""
        b = self.bias_mean if self.bias else 0.0
        without = float(expit(logit(self.baseline_rate) + b))
        return {"unseen": self.baseline_rate, "without": without, "seen": without * (1 + self.lift)}

    @property
    def lift_logodds(self) -> float:
        r = self.rates()
        return float(logit(r["seen"]) - logit(r["without"]))

    def with_users(self, users: float) -> PlanInputs:
        return replace(self, users=float(users))


def _sampling(inp: PlanInputs, users: float) -> tuple[float, float]:
    """Wald variances of the target's and of one placebo's log odds ratio at ``users``."""
    if np.isinf(users):
        return 0.0, 0.0
    ns, nu = users * inp.seen_share, users * (1 - inp.seen_share)
    r = inp.rates()
    v_t = 1 / (ns * r["seen"] * (1 - r["seen"])) + 1 / (nu * r["unseen"] * (1 - r["unseen"]))
    pp = inp.placebo_rate if inp.placebo_rate is not None else inp.baseline_rate
    ppw = expit(logit(pp) + (inp.bias_mean if inp.bias else 0.0))
    v_p = 1 / (ns * ppw * (1 - ppw)) + 1 / (nu * pp * (1 - pp))
    return float(v_t), float(v_p)


def spread_inflation(inp: PlanInputs) -> float:
    """Factor on ``residual_sd^2`` for learning it from the portfolio's placebo estimates.

    The spread is estimated from ``J m`` placebo estimates (less one for their mean), so a new
    outcome's residual is predicted with a t distribution on ``df = J m - 1`` degrees of freedom,
    whose variance is ``df / (df - 2)`` times the spread's square.  With ``df <= 2`` the spread
    comes from the prior; the factor is capped at 3 and :func:`plan` warns.
    """
    df = int(inp.campaigns) * int(inp.placebos) - 1
    return df / (df - 2) if df > 2 else 3.0


def variance_parts(inp: PlanInputs, users: float | None = None) -> dict[str, float]:
    """The log-odds variance of the corrected lift, by source, at ``users`` (``inf`` for the floor).

    Returns
    -------
    dict
        ``sampling`` (the target's), ``target_residual``, ``campaign_bias`` (left unknown after the
        campaign's placebos), ``shared_bias`` (the portfolio mean's), ``unpooled`` (their sum),
        ``pooled`` (after partial pooling across campaigns) and ``pooling_factor`` (pooled/unpooled).
    """
    n = inp.users if users is None else users
    v_t, v_p = _sampling(inp, n)
    if inp.bias:
        m, J = int(inp.placebos), int(inp.campaigns)
        r2 = inp.residual_sd**2 * spread_inflation(inp)
        vp_mean = (r2 + v_p) / m  # variance of the mean of the campaign's placebo estimates
        if inp.bias_sd > 0 and vp_mean > 0:
            post_b = 1 / (1 / inp.bias_sd**2 + 1 / vp_mean)
            w = post_b / inp.bias_sd**2  # weight the campaign's bias estimate puts on the portfolio mean
        else:
            post_b, w = (0.0, 1.0) if inp.bias_sd == 0 else (0.0, 0.0)
        shared = w**2 * (inp.bias_sd**2 + vp_mean) / J
        resid = r2
    else:
        post_b = shared = resid = 0.0
    ind = v_t + resid + post_b
    J = int(inp.campaigns)
    if J > 1 and inp.lift_sd > 0 and ind > 0:
        tau2 = inp.lift_sd**2
        B = ind / (ind + tau2)
        pooled_ind = ind * (1 - B) + B**2 * (ind + tau2) / J
    elif J > 1 and inp.lift_sd == 0:
        pooled_ind = ind / J  # every campaign has the same lift: complete pooling
    else:
        pooled_ind = ind
    unpooled = ind + shared
    pooled = pooled_ind + shared
    return {"sampling": v_t, "target_residual": resid, "campaign_bias": post_b, "shared_bias": shared,
            "unpooled": unpooled, "pooled": pooled, "pooling_factor": pooled / unpooled if unpooled > 0 else 1.0}


def _z(level: float) -> float:
    return float(stats.norm.ppf(0.5 + level / 2))


def _relative(inp: PlanInputs, logodds: np.ndarray | float) -> np.ndarray:
    """Relative lift among seen users for a log-odds lift (the model's derived quantity, one cell)."""
    pw = inp.rates()["without"]
    return expit(logit(pw) + np.asarray(logodds, dtype=float)) / pw - 1


def _interval(inp: PlanInputs, var: float) -> tuple[float, float]:
    h = _z(inp.level) * np.sqrt(var)
    lo, hi = _relative(inp, [inp.lift_logodds - h, inp.lift_logodds + h])
    return float(lo), float(hi)


def _difference_variances(inp: PlanInputs, users: float, bias_var: float) -> tuple[float, float]:
    """Null and alternative variance of (seen rate - its without-ad rate) at ``users``.

    ``bias_var`` is the log-odds variance of the bias correction (residual and bias terms), carried to
    the rate scale by the delta method.  With no bias the two are Fleiss's: both arms at the pooled rate
    under the null, each at its own rate under the alternative.
    """
    ns, nu = users * inp.seen_share, users * (1 - inp.seen_share)
    r = inp.rates()
    ps, pw, pu = r["seen"], r["without"], r["unseen"]
    # under the null the two arms keep the bias between them and the same expected total conversions
    total = ns * ps + nu * pu
    shift = optimize.brentq(lambda s: ns * expit(logit(pw) + s) + nu * expit(logit(pu) + s) - total, -30, 30)
    s0, u0 = expit(logit(pw) + shift), expit(logit(pu) + shift)
    g0, g1 = s0 * (1 - s0), pw * (1 - pw)  # d rate / d log odds of the without-ad rate
    v0 = s0 * (1 - s0) / ns + g0**2 / (nu * u0 * (1 - u0)) + g0**2 * bias_var
    v1 = ps * (1 - ps) / ns + g1**2 / (nu * pu * (1 - pu)) + g1**2 * bias_var
    return float(v0), float(v1)


def _power(inp: PlanInputs, users: float, both_tails: bool = True) -> float:
    """P(interval excludes zero); the users solve uses the main tail only, as the Fleiss formula does."""
    parts = variance_parts(inp, users)
    bias_var = parts["target_residual"] + parts["campaign_bias"] + parts["shared_bias"]
    v0, v1 = _difference_variances(inp, users, bias_var)
    f = parts["pooling_factor"]
    v0, v1 = v0 * f, v1 * f
    r = inp.rates()
    delta = abs(r["seen"] - r["without"])
    z = _z(inp.level)
    main = stats.norm.cdf((delta - z * np.sqrt(v0)) / np.sqrt(v1))
    other = stats.norm.cdf((-delta - z * np.sqrt(v0)) / np.sqrt(v1)) if both_tails else 0.0
    return float(main + other)


def _solve_users(fn, target: float, lo: float = 10.0, hi: float = 1e13) -> float | None:
    """Smallest users with ``fn(users) >= target`` for an increasing ``fn`` (None if not reached)."""
    if fn(hi) < target:
        return None
    if fn(lo) >= target:
        return lo
    return float(np.exp(optimize.brentq(lambda x: fn(np.exp(x)) - target, np.log(lo), np.log(hi), xtol=1e-10)))


@dataclass
class Plan:
    """A plan's results.

    Attributes
    ----------
    inputs : PlanInputs
    interval : (float, float)
        Expected credible interval of the relative lift at the planned users (pooled).
    width : float
        Its width (relative-lift points: 0.04 = 4 points).
    width_unpooled : float
        The width without pooling across campaigns.
    floor_width : float
        The width no number of users can go below (0 with the bias terms off).
    prob_excludes_zero : float
        Probability that the interval excludes zero (the lift is declared non-zero).
    parts : dict
        Log-odds variance by source at the planned users.
    users_for_width : float or None
        Users needed for ``target_width`` (None if below the floor).
    users_for_power : float or None
        Users needed for the interval to exclude zero with probability ``power``.
    target_width, power : float or None
    excess_target_width : float or None
        Wanted width of the interval of the excess bias's mean (log odds).
    tests_for_excess_width : int or None
        Randomized tests (on campaigns like this one) needed for it (None: not reachable).
    excess_widths : dict
        The excess bias's interval width (log odds) after 1, 2, 4 and 8 tests, and its floor for an
        untested campaign (``excess_sd`` itself remains: tests narrow the mean, not the spread).
    warnings : list of str
        What makes this plan optimistic (e.g. too few placebo estimates to learn the bias spread).
    """

    inputs: PlanInputs
    interval: tuple[float, float]
    width: float
    width_unpooled: float
    floor_width: float
    prob_excludes_zero: float
    parts: dict
    users_for_width: float | None = None
    users_for_power: float | None = None
    target_width: float | None = None
    power: float | None = None
    excess_target_width: float | None = None
    tests_for_excess_width: int | None = None
    excess_widths: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)

    def to_dict(self) -> dict:
        out = {k: v for k, v in self.__dict__.items() if k != "inputs"}
        out["interval"] = list(self.interval)
        out["inputs"] = self.inputs.to_dict()
        out["assumptions"] = list(PLAN_ASSUMPTIONS)
        return out

    def render(self) -> str:
        i = self.inputs
        pct = lambda x: f"{100 * x:+.1f}%"  # noqa: E731
        lines = [
            f"plan for {i.users:,.0f} exposed users ({100 * i.seen_share:.0f}% seen), target rate "
            f"{100 * i.baseline_rate:.3g}% among unseen users, expected lift {pct(i.lift)}, "
            f"{i.placebos} placebo outcome(s), {i.campaigns} campaign(s) pooled, {100 * i.level:.0f}% intervals",
            f"  variance components: {i.source} (bias mean {i.bias_mean:.3g}, bias sd {i.bias_sd:.3g}, "
            f"residual sd {i.residual_sd:.3g}, lift sd {i.lift_sd:.3g}; log odds)"
            if i.bias else "  bias terms switched off (randomized-test arithmetic)",
            f"  expected interval: {pct(self.interval[0])} to {pct(self.interval[1])} "
            f"(width {100 * self.width:.1f} points; {100 * self.width_unpooled:.1f} without pooling)",
            f"  floor: no number of users gives a width below {100 * self.floor_width:.1f} points",
            f"  probability the interval excludes zero: {100 * self.prob_excludes_zero:.0f}%",
        ]
        if self.target_width is not None:
            lines.append(f"  users for a width of {100 * self.target_width:.1f} points: "
                         + (f"{self.users_for_width:,.0f}" if self.users_for_width is not None else
                            "not reachable (below the floor): add placebo outcomes or campaigns"))
        if self.power is not None:
            lines.append(f"  users for a {100 * self.power:.0f}% chance to exclude zero: "
                         + (f"{self.users_for_power:,.0f}" if self.users_for_power is not None else
                            "not reachable at this lift (the floor is too wide)"))
        if self.excess_widths:
            ew = self.excess_widths
            lines.append("  randomized tests: interval width of the target's excess bias (log odds) after "
                         + ", ".join(f"{k} test{'s' if k != 1 else ''} {ew[k]:.3f}" for k in (1, 2, 4, 8))
                         + f"; an untested campaign keeps the excess spread ({i.excess_sd:.3g}) on top")
        if self.excess_target_width is not None:
            lines.append(f"  randomized tests for an excess-bias width of {self.excess_target_width:.3f} (log odds): "
                         + (f"{self.tests_for_excess_width}" if self.tests_for_excess_width is not None else
                            "not reachable with tests this precise"))
        lines += [f"  warning: {w}" for w in self.warnings]
        lines.append("assumptions:")
        lines += [f"  - {a}" for a in PLAN_ASSUMPTIONS]
        return "\n".join(lines)


def _test_variance(inp: PlanInputs) -> float:
    """What one randomized test tells about the excess bias: the variance of (observational estimate - test).

    The campaign's observational estimate (unpooled: its own target and placebos) minus the test's
    lift measures the excess bias plus the target's own residual; its variance adds the test's.
    """
    return variance_parts(inp)["unpooled"] + inp.test_se**2 + inp.excess_sd**2


def excess_width(inp: PlanInputs, tests: int) -> float:
    """Width (log odds) of the interval of the excess bias's mean after ``tests`` randomized tests.

    A normal approximation: each test measures the excess with the variance of
    :func:`_test_variance`, and the mean's prior is ``N(0, excess_mean_scale)``.
    """
    var = 1.0 / (1.0 / inp.excess_mean_scale**2 + tests / _test_variance(inp))
    return 2.0 * _z(inp.level) * float(np.sqrt(var))


def tests_for_excess_width(inp: PlanInputs, width: float, most: int = 10_000) -> int | None:
    """The fewest randomized tests for an excess-bias interval of at most ``width`` (None beyond ``most``)."""
    need = (2.0 * _z(inp.level) / width) ** 2 - 1.0 / inp.excess_mean_scale**2
    if need <= 0:
        return 0
    k = int(np.ceil(need * _test_variance(inp) - 1e-9))
    return k if k <= most else None


def plan(inp: PlanInputs, target_width: float | None = None, power: float | None = None,
         excess_target_width: float | None = None) -> Plan:
    """Plan one campaign.

    Parameters
    ----------
    inp : PlanInputs
    target_width : float, optional
        Wanted interval width in relative-lift points (0.05 = 5 points); the users needed are solved.
    power : float, optional
        Wanted probability that the interval excludes zero; the users needed are solved.
    excess_target_width : float, optional
        Wanted width (log odds) of the interval of the target's excess bias; the randomized tests
        needed are solved (:func:`tests_for_excess_width`).

    Returns
    -------
    Plan
    """
    if excess_target_width is not None and not excess_target_width > 0:
        raise ConfigError(problem=f"excess-bias width must be positive, got {excess_target_width!r}",
                          fix="give it on the log-odds scale, e.g. 0.1")
    if target_width is not None and not target_width > 0:
        raise ConfigError(problem=f"target width must be positive, got {target_width!r}",
                          fix="give it in relative-lift points, e.g. 0.05 for 5 points")
    if power is not None and not 0 < power < 1:
        raise ConfigError(problem=f"power must be between 0 and 1, got {power!r}", fix="e.g. 0.8")
    parts = variance_parts(inp)
    lo, hi = _interval(inp, parts["pooled"])
    ulo, uhi = _interval(inp, parts["unpooled"])
    flo, fhi = _interval(inp, variance_parts(inp, np.inf)["pooled"])
    out = Plan(inputs=inp, interval=(lo, hi), width=hi - lo, width_unpooled=uhi - ulo, floor_width=fhi - flo,
               prob_excludes_zero=_power(inp, inp.users), parts=parts, target_width=target_width, power=power)
    if inp.bias and int(inp.campaigns) * int(inp.placebos) - 1 <= 2:
        out.warnings.append(
            f"only {int(inp.campaigns) * int(inp.placebos)} placebo estimate(s) in the portfolio: the spread of "
            "the bias will come mostly from the prior, and the real interval may be wider than planned; "
            "add placebo outcomes, or check with a simulation (--simulate)")
    if inp.bias:
        out.excess_widths = {k: excess_width(inp, k) for k in (1, 2, 4, 8)}
        if excess_target_width is not None:
            out.excess_target_width = excess_target_width
            out.tests_for_excess_width = tests_for_excess_width(inp, excess_target_width)
    if target_width is not None:
        def narrowness(n):
            a, b = _interval(inp, variance_parts(inp, n)["pooled"])
            return -(b - a)
        out.users_for_width = _solve_users(narrowness, -target_width)
    if power is not None:
        out.users_for_power = _solve_users(lambda n: _power(inp, n, both_tails=False), power)
    return out


def width_curve(inp: PlanInputs, users: np.ndarray, placebo_counts=(1, 2, 4, 8, 16)) -> pd.DataFrame:
    """Expected (pooled) interval width against users for several placebo counts.

    Returns
    -------
    DataFrame
        ``placebos, users, width, floor_width``.
    """
    rows = []
    for m in placebo_counts:
        q = replace(inp, placebos=int(m)) if inp.bias else inp
        flo, fhi = _interval(q, variance_parts(q, np.inf)["pooled"])
        for n in np.asarray(users, dtype=float):
            lo, hi = _interval(q, variance_parts(q, n)["pooled"])
            rows.append({"placebos": int(m), "users": n, "width": hi - lo, "floor_width": fhi - flo})
    return pd.DataFrame(rows)


def plan_inputs_from_fit(fit, campaign: str | None = None, **overrides) -> PlanInputs:
    """Plan inputs that reuse a fit's bias spread and pooling (posterior means) and its data.

    Parameters
    ----------
    fit : FitResult
    campaign : str, optional
        Take users, seen share and rate from this campaign (default: the median campaign).
    **overrides
        Any ``PlanInputs`` field (e.g. ``users`` for a future campaign).
    """
    post, cd = fit.idata.posterior, fit.idata.constant_data

    def mean(name, default=None):
        return float(post[name].mean()) if name in post else default

    ns = cd["users_seen"].to_numpy().astype(float)
    nu = cd["users_unseen"].to_numpy().astype(float)
    xu = cd["target_conversions_unseen"].to_numpy().astype(float)
    camps = [str(c) for c in cd["campaign"].values]
    if campaign is not None:
        if campaign not in camps:
            raise ConfigError.invalid_choice("campaign", campaign, camps)
        i = camps.index(campaign)
        users, share, rate = ns[i] + nu[i], ns[i] / (ns[i] + nu[i]), (xu[i] + 0.5) / (nu[i] + 1)
    else:
        users, share, rate = float(np.median(ns + nu)), float(ns.sum() / (ns + nu).sum()), float(
            (xu.sum() + 0.5) / (nu.sum() + 1))
    roles = cd["pair_role"].to_numpy().astype(str)
    per_camp = pd.Series(cd["pair_campaign"].to_numpy().astype(str)[roles == "placebo"]).value_counts()
    placebos = int(np.median(per_camp.reindex(camps).fillna(0))) if len(per_camp) else 0
    lm = mean("lift_mean", 0.0)
    vals: dict[str, Any] = {"users": users, "seen_share": share, "baseline_rate": rate,
                            "lift": float(np.expm1(lm)), "placebos": max(placebos, 1 if fit.corrected else 0),
                            "campaigns": len(camps), "level": fit.settings.level,
                            "lift_sd": mean("lift_sd", 0.0), "bias": bool(fit.corrected),
                            "excess_sd": mean("excess_sd", PlanInputs.excess_sd),
                            "excess_mean_scale": fit.settings.excess_mean_scale,
                            "source": f"{fit.mode} fit posterior means"}
    if fit.corrected:
        if fit.mode == "quick":  # the quick mode has one bias distribution for the portfolio
            vals.update(bias_mean=mean("bias_mean", 0.0), bias_sd=0.0, residual_sd=mean("bias_sd", 0.0))
        else:
            vals.update(bias_mean=mean("bias_mean", mean("bias", 0.0)), bias_sd=mean("bias_sd", 0.0),
                        residual_sd=mean("residual_sd", 0.0))
    vals.update(overrides)
    return PlanInputs.from_mapping(vals)


def simulate_plan(inp: PlanInputs, n_sims: int = 100, seed: int = 0, n_draws: int = 1000) -> dict[str, float]:
    """Cross-check a plan by simulation: draw counts from the plan's story, fit the quick mode, measure.

    Each replication draws every campaign's bias, outcome residuals and lift, then seen and unseen
    conversions for one cell, fits the quick mode and takes the first campaign's interval of the
    relative lift.  The quick mode pools the bias as one portfolio distribution, so the comparison
    with :func:`plan` is exact in structure when ``bias_sd`` is 0.

    Returns
    -------
    dict
        ``mean_width`` and its Monte Carlo standard error, ``excludes_zero`` (share of replications),
        ``coverage`` (share covering the true relative lift).
    """
    from liftpool.models.design import make_design
    from liftpool.models.quick import quick_fit, quick_relative
    from liftpool.models.settings import ModelSettings

    rng = np.random.default_rng(seed)
    J, m = int(inp.campaigns), int(inp.placebos) if inp.bias else 0
    ns = int(round(inp.users * inp.seen_share))
    nu = int(round(inp.users)) - ns
    pp = inp.placebo_rate if inp.placebo_rate is not None else inp.baseline_rate
    settings = ModelSettings(level=inp.level)
    widths, excl, cover = [], [], []
    for _ in range(n_sims):
        rows = []
        lifts = inp.lift_logodds + (inp.lift_sd * rng.standard_normal(J) if J > 1 else np.zeros(J))
        for c in range(J):
            b = (inp.bias_mean + inp.bias_sd * rng.standard_normal()) if inp.bias else 0.0
            for o in range(m + 1):
                res = inp.residual_sd * rng.standard_normal() if inp.bias else 0.0
                base = logit(inp.baseline_rate if o == 0 else pp)
                eff = b + res + (lifts[c] if o == 0 else 0.0)
                xs = rng.binomial(ns, expit(base + eff))
                xu = rng.binomial(nu, expit(base))
                name, role = f"c{c:03d}", "target" if o == 0 else "placebo"
                rows += [(name, "all", "seen", f"{name}_o{o}", role, ns, xs),
                         (name, "all", "unseen", f"{name}_o{o}", role, nu, xu)]
        counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
        d = make_design(counts)
        q = quick_fit(d, replace(settings, seed=int(rng.integers(2**31))), n_draws=n_draws)
        rel, _, _ = quick_relative(d, q.lift_logodds)
        lo, hi = np.quantile(rel[:, 0], [0.5 - inp.level / 2, 0.5 + inp.level / 2])
        widths.append(hi - lo)
        excl.append(lo > 0 or hi < 0)
        true_rel = float(_relative(inp, lifts[0]))
        cover.append(lo <= true_rel <= hi)
    w = np.array(widths)
    return {"mean_width": float(w.mean()), "width_mcse": float(w.std(ddof=1) / np.sqrt(len(w))),
            "excludes_zero": float(np.mean(excl)), "coverage": float(np.mean(cover)), "n_sims": n_sims}
