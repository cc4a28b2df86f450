"""Held-out checks of the calibration: each randomized test, and each placebo, predicted without itself.

For a held-out item (a test's result, or a placebo's estimate) of campaign ``c``, the prediction
from everything else is, given the population parameters ``phi``, a normal: campaign ``c``'s bias
and lift ``(b, l)`` have the prior ``N(bias_mean, bias_sd) x N(centre_c, spread_c)`` and its other
observations are normal given them::

    placebo q:  z_q ~ N(b + o_q, residual_sd^2 + s_q^2)
    target:     z_t ~ N(b + l + o_t + excess_mean, residual_sd^2 + excess_sd^2 + s_t^2)
    test:       y   ~ N(l, se^2)

(each curve by its Gaussian approximation, peak ``z`` and standard error ``s``, as in the quick
mode).  Averaging over ``phi`` uses the fit's own draws re-weighted to leave the item out: the
posterior without it is the full posterior divided by the item's predictive density given ``phi``
and the campaign's other data (the integrated leave-one-out of Vehtari, Gelman & Gabry 2017,
Statistics and Computing 27; the weights Pareto-smoothed by :func:`arviz.psislw`, whose ``k``
above 0.7 marks a check the draws cannot support).  The held-out predictive is then a mixture of
normals; its central interval at ``level`` covers the item or not, and over many items the
coverage should be near ``level``.  A randomized test is held out by refitting instead (the quick
mode's exact posterior without it, seconds): with a few tests, one of them moves the excess bias's
posterior further than re-weighting can follow.

Both checks are approximations in two ways, stated in the report: the campaign's own curves are
Gaussian, and a truncated bias (``bias_sign="nonnegative"``) is treated as untruncated here.
"""

from __future__ import annotations

import math

import numba
import numpy as np
import pandas as pd
from scipy import special

from liftpool.models.evidence import CampaignTests

__all__ = ["heldout_checks", "HELDOUT_COLUMNS", "KHAT_LIMIT", "STORED_LEVELS", "level_columns"]

#: Pareto k above which importance sampling cannot be trusted (Vehtari et al. 2017; arviz's threshold).
KHAT_LIMIT = 0.7
#: Levels whose held-out intervals are stored besides the fit's (a report at another level reads them;
#: coverage at any level follows from the PIT value).
STORED_LEVELS = (0.5, 0.8, 0.9, 0.95)
HELDOUT_COLUMNS = ["kind", "campaign", "item", "observed", "std_error", "lower", "median", "upper", "pit", "covered",
                   "model_lower", "model_median", "model_upper", "pareto_k"]


def level_columns(level: float) -> tuple[str, str, str, str]:
    """The stored columns of the held-out interval at ``level``: predictive lower, upper; model lower, upper."""
    k = f"{level * 100:g}"
    return f"lower_{k}", f"upper_{k}", f"model_lower_{k}", f"model_upper_{k}"


def _mixture_quantiles(w: np.ndarray, mu: np.ndarray, sd: np.ndarray, qs) -> list[float]:
    """Quantiles of sum_s w_s N(mu_s, sd_s)."""
    return [float(x) for x in _batch_quantiles(w[None], mu[None], sd[None], np.asarray(qs, float))[0]]


def _population(d, post: dict, s, D: int) -> dict:
    """Per draw: bias prior (mb, vb), lift prior centre and variance (D, C), residual and excess variances."""
    C = d.n_campaigns
    single = C == 1
    from liftpool.models.completion import lift_spread

    if single:
        centre = np.zeros((D, 1))
        spread = np.full((D, 1), float(s.lift_mean_scale))
        mb, sb = np.zeros(D), np.full(D, float(s.bias_mean_scale))
    else:
        centre = np.repeat(post["lift_mean"][:, None], C, axis=1)
        spread = (lift_spread(post["lift_sd"], post["group_sd"], d.campaign_group) if "group_sd" in post
                  else np.repeat(post["lift_sd"][:, None], C, axis=1))
        if "group_effect" in post:
            cg = np.maximum(d.campaign_group, 0)
            centre = centre + np.where(d.campaign_group >= 0, post["group_effect"][:, cg], 0.0)
        mb, sb = post["bias_mean"], post["bias_sd"]
    return {"centre": centre, "vl": spread**2, "mb": mb, "vb": sb**2, "vr": post["residual_sd"] ** 2,
            "me": post.get("excess_mean", np.zeros(D)), "ve": post.get("excess_sd", np.zeros(D)) ** 2}


def heldout_checks(d, curves, post: dict, s, tests: CampaignTests, tests_table: pd.DataFrame | None,
                   level: float, max_draws: int = 1000) -> pd.DataFrame:
    """Leave-one-test-out and leave-one-placebo-out predictions (rows of :data:`HELDOUT_COLUMNS`).

    Parameters
    ----------
    d : Design
    curves : CurveSet
    post : dict
        Flat (D,) draws of the population parameters (``residual_sd``, ``bias_mean``, ``bias_sd``,
        ``lift_mean``, ``lift_sd``, and where present ``excess_mean``, ``excess_sd``, ``group_sd``,
        ``group_effect`` (D, G), ``outcome_bias`` (D, O)).
    s : ModelSettings
    tests : CampaignTests
    tests_table : DataFrame or None
        The converted tests (for their names); a tested campaign is held out with all its tests.
    max_draws : int
        Population draws used (evenly thinned).
    level : float

    Returns
    -------
    DataFrame
        ``kind`` is ``"test"`` (observed: the test's lift among the exposed, combined over a
        campaign's tests; its interval the predictive of that result; ``model_*`` the lift itself
        without the test, both as relative lifts) or ``"placebo"`` (log odds: the placebo's
        estimate and its predictive).  ``pit`` is the predictive CDF at the observation.
    """
    if d.flags.no_placebo_anywhere:
        return pd.DataFrame(columns=HELDOUT_COLUMNS)
    D0 = post["residual_sd"].shape[0]
    take = np.linspace(0, D0 - 1, min(max_draws, D0)).astype(int)
    post = {k: np.asarray(v)[take] for k, v in post.items() if isinstance(v, np.ndarray) and v.ndim >= 1
            and v.shape[0] == D0}
    pop = _population(d, post, s, take.size)
    rows = []
    batch = []  # every placebo's predictive (mean, sd per draw), then weighed and summarized at once
    for c in range(d.n_campaigns):
        obs = _observations(d, curves, c, pop, post.get("outcome_bias"), tests)
        batch += _placebo_predictives(obs, pop, c, curves)
        if tests.has[c]:
            # a test is held out by refitting without it: with few tests, one test moves the excess bias's
            # posterior too far for re-weighting the fit's own draws (Pareto k above 0.7 in trials)
            q = _refit_without(d, curves, s, tests.drop(c), take.size)
            qpop = _population(d, q, s, take.size)
            qobs = _observations(d, curves, c, qpop, q.get("outcome_bias"), tests)
            rows.append(_predict(d, c, qobs, len(qobs) - 1, qpop, level, -1, curves, tests, tests_table,
                                 importance=False))
    rows += _placebo_rows(d, curves, batch, level)
    levels = sorted(set(STORED_LEVELS) | {float(level)})
    extra = [c for lv in levels for c in level_columns(lv)]
    out = pd.DataFrame(rows, columns=HELDOUT_COLUMNS + extra)
    return out.sort_values(["campaign", "kind", "item"], kind="stable").reset_index(drop=True)


def _placebo_rows(d, curves, batch: list, level: float) -> list[dict]:
    """The placebos' held-out rows: Pareto-smoothed weights, PIT and interval ends, all placebos at once."""
    if not batch:
        return []
    import arviz as az

    MU = np.stack([b[2] for b in batch])  # (I, D)
    SD = np.stack([b[3] for b in batch])
    VAL = np.array([curves.mode[b[1]] for b in batch])[:, None]
    logp = -0.5 * ((VAL - MU) / SD) ** 2 - np.log(SD)
    lw, k = az.psislw(-logp)
    W = np.exp(np.asarray(lw) - np.asarray(lw).max(axis=1, keepdims=True))
    W /= W.sum(axis=1, keepdims=True)
    pit = (W * special.ndtr((VAL - MU) / SD)).sum(axis=1)
    levels = sorted(set(STORED_LEVELS) | {float(level)})
    probs = np.array([0.5] + [q for lv in levels for q in ((1 - lv) / 2, (1 + lv) / 2)])
    Q = _batch_quantiles(W, MU, SD, probs)
    a = (1 - level) / 2
    col = {q: j for j, q in enumerate(probs)}
    pairs = np.array([b[1] for b in batch])
    cols = {"kind": "placebo", "campaign": np.asarray(d.campaigns, dtype=object)[[b[0] for b in batch]],
            "item": np.asarray(d.outcomes, dtype=object)[d.pair_outcome[pairs]].astype(str),
            "observed": curves.mode[pairs], "std_error": np.sqrt(1.0 / curves.information[pairs]),
            "lower": Q[:, col[a]], "median": Q[:, col[0.5]], "upper": Q[:, col[1 - a]], "pit": pit,
            "covered": (pit >= a) & (pit <= 1 - a), "model_lower": np.nan, "model_median": np.nan,
            "model_upper": np.nan, "pareto_k": np.ravel(k)}
    for lv in levels:
        cl, cu, ml_, mu_ = level_columns(lv)
        cols[cl], cols[cu], cols[ml_], cols[mu_] = Q[:, col[(1 - lv) / 2]], Q[:, col[(1 + lv) / 2]], np.nan, np.nan
    return pd.DataFrame(cols).to_dict(orient="records")


def _batch_quantiles(W: np.ndarray, MU: np.ndarray, SD: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """Quantiles (I, len(probs)) of the mixtures sum_s W[i, s] N(MU[i, s], SD[i, s]) (:func:`_mixture_kernel`)."""
    f = lambda a: np.ascontiguousarray(a, dtype=np.float64)  # noqa: E731
    return _mixture_kernel(f(W), f(MU), f(SD), f(np.asarray(probs)))


@numba.njit(cache=True, parallel=True)
def _mixture_kernel(W, MU, SD, probs):
    """Each mixture's quantiles: safeguarded Newton steps on its exact CDF from the moment-matched normal.

    Newton's step uses the mixture's density; a step that leaves the bracket known to hold the root is
    replaced by bisection, so it converges for any mixture. Stops at a CDF error below 1e-9.
    """
    n_items, D = MU.shape
    out = np.empty((n_items, probs.size))
    for i in numba.prange(n_items):
        m1, m2 = 0.0, 0.0
        lo, hi = np.inf, -np.inf
        for s in range(D):
            m1 += W[i, s] * MU[i, s]
            m2 += W[i, s] * (SD[i, s] ** 2 + MU[i, s] ** 2)
            lo = min(lo, MU[i, s] - 40.0 * SD[i, s])
            hi = max(hi, MU[i, s] + 40.0 * SD[i, s])
        sd0 = math.sqrt(max(m2 - m1 * m1, 1e-300))
        for j in range(probs.size):
            q = probs[j]
            # start: the normal with the mixture's mean and variance (Acklam-free: a few Newton steps fix it)
            x = m1 + sd0 * math.sqrt(2.0) * _erfinv(2.0 * q - 1.0)
            a, b = lo, hi
            for _ in range(100):
                F, dens = 0.0, 0.0
                for s in range(D):
                    z = (x - MU[i, s]) / SD[i, s]
                    F += W[i, s] * 0.5 * math.erfc(-z / math.sqrt(2.0))
                    dens += W[i, s] * math.exp(-0.5 * z * z) / (SD[i, s] * math.sqrt(2.0 * math.pi))
                err = F - q
                if abs(err) < 1e-9:
                    break
                if err > 0:
                    b = min(b, x)
                else:
                    a = max(a, x)
                step = x - err / dens if dens > 0 else 0.5 * (a + b)
                x = step if a < step < b else 0.5 * (a + b)
            out[i, j] = x
    return out


@numba.njit(cache=True)
def _erfinv(y):
    """The inverse error function (Giles 2010's single-precision-grade approximation; refined by Newton after)."""
    w = -math.log((1.0 - y) * (1.0 + y))
    if w < 5.0:
        w -= 2.5
        p = 2.81022636e-08
        for c in (3.43273939e-07, -3.5233877e-06, -4.39150654e-06, 0.00021858087, -0.00125372503,
                  -0.00417768164, 0.246640727, 1.50140941):
            p = c + p * w
    else:
        w = math.sqrt(w) - 3.0
        p = -0.000200214257
        for c in (0.000100950558, 0.00134934322, -0.00367342844, 0.00573950773, -0.0076224613,
                  0.00943887047, 1.00167406, 2.83297682):
            p = c + p * w
    return p * y


def _refit_without(d, curves, s, tests: CampaignTests, n_draws: int) -> dict:
    """The quick mode's posterior of the population parameters with these tests (exact, no sampler)."""
    from liftpool.models.gaussian import gaussian_posterior

    se = np.where(curves.informative, 1.0 / np.sqrt(np.maximum(curves.information, 1e-300)), np.inf)
    q = gaussian_posterior(curves.mode, se, curves.informative, d.pair_campaign, d.target_pair(), s, n_draws,
                           np.random.default_rng(s.seed + 17), tests=tests)
    if "excess_mean" not in q and s.excess_bias != "off":  # no test left: the excess is fixed at 0
        q["excess_mean"], q["excess_sd"] = np.zeros(n_draws), np.zeros(n_draws)
    return {k: v for k, v in q.items() if isinstance(v, np.ndarray)}


def _observations(d, curves, c: int, pop: dict, ob, tests: CampaignTests) -> list:
    """Campaign ``c``'s observations: (kind, pair, coefficient on b, on l, value minus offset, variance (D,))."""
    D = pop["mb"].shape[0]
    info = np.where(curves.informative, curves.information, 0.0)
    z = curves.mode
    tp = d.target_pair()
    obs = []
    for p in np.flatnonzero((d.pair_campaign == c) & curves.informative):
        o = ob[:, d.pair_outcome[p]] if ob is not None else np.zeros(D)
        s2 = 1.0 / info[p]
        if p == tp[c]:
            obs.append(("target", p, 1.0, 1.0, z[p] - o - pop["me"], pop["vr"] + pop["ve"] + s2))
        else:
            obs.append(("placebo", p, 1.0, 0.0, z[p] - o, pop["vr"] + s2))
    if tests.has[c]:
        obs.append(("test", -1, 0.0, 1.0, np.full(D, tests.y[c]), np.full(D, tests.se2[c])))
    return obs


def _predict(d, c: int, obs: list, i: int, pop: dict, level: float, p: int, curves, tests, tests_table,
             importance: bool) -> dict:
    """Observation ``i`` of campaign ``c`` predicted from the campaign's other observations and the prior."""
    import arviz as az

    D = pop["mb"].shape[0]
    kind, m, mu, sd, V = _conditional(obs, i, pop, c)
    val, var = obs[i][4], obs[i][5]
    k = np.nan
    w = np.full(D, 1.0 / D)
    if importance:  # the fit's draws without the item: divided by its predictive density given them
        logp = -0.5 * ((val - mu) / sd) ** 2 - np.log(sd)
        lw, kk = az.psislw(-logp[None, :])
        w = np.exp(np.asarray(lw).ravel())
        w /= w.sum()
        k = float(np.ravel(kk)[0])
    return _row(d, c, kind, p, val, var, w, mu, sd, m, V, k, level, curves, tests, tests_table)


def _placebo_predictives(obs: list, pop: dict, c: int, curves) -> list:
    """Every placebo of campaign ``c`` predicted from the campaign's other observations, at once.

    A placebo observes the bias alone (coefficients (1, 0)), so leaving it out changes only the first
    entry of the campaign's information and of its information-weighted sum. Returns ``(c, pair, mu,
    sd)`` on the estimate's own scale (the outcome bias added back).
    """
    idx = [j for j, o in enumerate(obs) if o[0] == "placebo"]
    if not idx:
        return []
    D = pop["mb"].shape[0]
    P00, P01, P11 = 1.0 / pop["vb"], np.zeros(D), 1.0 / pop["vl"][:, c]
    e0, e1 = pop["mb"] / pop["vb"], pop["centre"][:, c] / pop["vl"][:, c]
    for _, _, hb, hl, val, var in obs:
        P00, P01, P11 = P00 + hb * hb / var, P01 + hb * hl / var, P11 + hl * hl / var
        e0, e1 = e0 + hb * val / var, e1 + hl * val / var
    val = np.stack([obs[j][4] for j in idx])  # (n, D)
    var = np.stack([obs[j][5] for j in idx])
    q00, f0 = P00 - 1.0 / var, e0 - val / var
    det = q00 * P11 - P01**2
    v00 = P11 / det
    mu = v00 * f0 - P01 / det * e1
    sd = np.sqrt(v00 + var)
    return [(c, obs[j][1], mu[n] + (curves.mode[obs[j][1]] - val[n]), sd[n]) for n, j in enumerate(idx)]


def _conditional(obs: list, i: int, pop: dict, c: int):
    """Observation ``i``'s predictive given the campaign's other observations, per draw: (kind, m, mu, sd, V)."""
    D = pop["mb"].shape[0]
    P = np.zeros((D, 2, 2))
    P[:, 0, 0] = 1.0 / pop["vb"]
    P[:, 1, 1] = 1.0 / pop["vl"][:, c]
    eta = np.stack([pop["mb"] / pop["vb"], pop["centre"][:, c] / pop["vl"][:, c]], -1)
    for j, (_, _, hb, hl, val, var) in enumerate(obs):
        if j == i:
            continue
        h = np.array([hb, hl])
        P += np.einsum("i,j->ij", h, h)[None] / var[:, None, None]
        eta += h[None] * (val / var)[:, None]
    kind, _, hb, hl, val, var = obs[i]
    det = P[:, 0, 0] * P[:, 1, 1] - P[:, 0, 1] * P[:, 1, 0]
    V = np.stack([np.stack([P[:, 1, 1], -P[:, 0, 1]], -1), np.stack([-P[:, 1, 0], P[:, 0, 0]], -1)], -2) / det[:, None, None]
    m = np.einsum("dij,dj->di", V, eta)
    mu = m[:, 0] * hb + m[:, 1] * hl
    sd = np.sqrt(hb * hb * V[:, 0, 0] + 2 * hb * hl * V[:, 0, 1] + hl * hl * V[:, 1, 1] + var)
    return kind, m, mu, sd, V


def _row(d, c, kind, p, val, var, w, mu, sd, m, V, k, level, curves, tests, tests_table) -> dict:
    """One held-out row from the weighted predictive mixture."""
    a = (1 - level) / 2
    pit = float((w * special.ndtr((val - mu) / sd)).sum())
    levels = sorted(set(STORED_LEVELS) | {float(level)})
    probs = [0.5] + [q for lv in levels for q in ((1 - lv) / 2, (1 + lv) / 2)]
    qs = dict(zip(probs, _mixture_quantiles(w, mu, sd, probs), strict=True))
    lo, med, hi = qs[a], qs[0.5], qs[1 - a]
    row = {"kind": kind, "campaign": d.campaigns[c], "pareto_k": k, "pit": pit, "covered": bool(a <= pit <= 1 - a)}
    f = np.expm1 if kind == "test" else (lambda x: x)  # a test's on the relative scale, a placebo's in log odds
    mq = (dict(zip(probs, _mixture_quantiles(w, m[:, 1], np.sqrt(V[:, 1, 1]), probs), strict=True))
          if kind == "test" else {})
    for lv in levels:
        cl, cu, ml_, mu_ = level_columns(lv)
        row[cl], row[cu] = float(f(qs[(1 - lv) / 2])), float(f(qs[(1 + lv) / 2]))
        row[ml_], row[mu_] = (float(f(mq[(1 - lv) / 2])), float(f(mq[(1 + lv) / 2]))) if mq else (np.nan, np.nan)
    if kind == "test":
        # the lift itself without the test, and the test's predictive, as relative lifts
        mlo, mmed, mhi = mq[a], mq[0.5], mq[1 - a]
        names = (tests_table.loc[tests_table["campaign"] == d.campaigns[c], "test"].tolist()
                 if tests_table is not None else [])
        y = float(val[0])
        row.update(item=" + ".join(names) or f"{d.campaigns[c]} test", observed=float(np.expm1(y)),
                   std_error=float(np.sqrt(var[0]) * np.exp(y)), lower=float(np.expm1(lo)),
                   median=float(np.expm1(med)), upper=float(np.expm1(hi)), model_lower=float(np.expm1(mlo)),
                   model_median=float(np.expm1(mmed)), model_upper=float(np.expm1(mhi)))
    else:
        row.update(item=str(d.outcomes[d.pair_outcome[p]]), observed=float(curves.mode[p]),
                   std_error=float(np.sqrt(1.0 / curves.information[p])), lower=lo, median=med, upper=hi,
                   model_lower=np.nan, model_median=np.nan, model_upper=np.nan)
    return row
