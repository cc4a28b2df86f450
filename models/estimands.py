"""Every reported quantity as draws: one xarray Dataset per fit, full or quick, in natural units.

The reports format this Dataset and its summary and compute nothing of their own. Its dimensions are
``(chain, draw, unit)``; ``unit`` holds the campaigns, then the pooled rows :data:`PORTFOLIO`
(all campaigns together) and :data:`NEW_CAMPAIGN` (the predictive of a campaign not yet seen),
with a ``kind`` coordinate (``"campaign"``, ``"portfolio"``, ``"new campaign"``). A quantity a unit
does not have (the portfolio's bias, a new campaign's conversions) is NaN there.

Units: lifts are fractions (0.12 is +12%), log odds are log odds, conversions are conversions,
money is in the spend table's currency. The quantities, their units and meanings are
:data:`QUANTITIES` (the report's definitions sheet prints it).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from liftpool.models.summary import NEW_CAMPAIGN, PORTFOLIO, SUMMARY_COLUMNS

__all__ = ["estimand_draws", "add_money", "summarize", "QUANTITIES", "PROBABILITIES", "KINDS", "USER_COUNTS",
           "cost_per_incremental", "placebo_summary", "shrinkage_summary", "interval"]

#: The kinds of unit, in the order the units are listed.
KINDS = ("campaign", "portfolio", "new campaign")

#: name: (unit, meaning). The one list of reported quantities.
QUANTITIES = {
    "lift": ("fraction", "bias-corrected relative lift among users who saw the ads: their conversions over "
                         "what they would have done without the ads, minus 1"),
    "lift_uncorrected": ("fraction", "seen against unseen users within cells, bias still in"),
    "lift_naive": ("fraction", "exposed against unexposed users, no cells and no bias correction"),
    "lift_logodds": ("log odds", "bias-corrected lift on the log-odds scale (the model's own scale)"),
    "bias": ("log odds", "the bias on the target's seen/unseen log odds ratio that the correction removes"),
    "incremental_conversions": ("conversions", "conversions the ads added among users who saw them"),
    "counterfactual_conversions": ("conversions", "conversions the seen users would have made without the ads"),
    "spend": ("money", "spend from the spend table (a constant, not a draw)"),
    "cost_per_incremental_conversion": ("money", "spend divided by incremental conversions; not bounded "
                                                 "where incremental conversions can be zero or below"),
    "incremental_revenue": ("money", "incremental conversions times the value per conversion"),
    "return_on_ad_spend": ("ratio", "incremental revenue divided by spend; 1 is break-even"),
}
#: name: (of quantity, threshold, meaning): probabilities the summary reports in its ``mean`` column.
PROBABILITIES = {
    "p_lift_positive": ("lift", 0.0, "share of draws with a bias-corrected lift above zero"),
    "p_paid_for_itself": ("return_on_ad_spend", 1.0, "share of draws with incremental revenue above spend"),
}
#: Constants by unit stored beside the draws: the users and target conversions behind each estimate.
USER_COUNTS = ("users_seen", "users_unseen", "target_conversions_seen", "target_conversions_unseen")
_PER_CAMPAIGN = ("lift", "lift_uncorrected", "lift_naive", "lift_logodds", "incremental_conversions",
                 "counterfactual_conversions")


def estimand_draws(posterior: xr.Dataset, corrected: bool, seed: int, data: xr.Dataset | None = None) -> xr.Dataset:
    """The reported quantities' draws from a fit's posterior (full or quick: the same variables).

    Parameters
    ----------
    posterior : Dataset
        The fit's posterior: per-campaign ``lift``, ``lift_uncorrected``, ``lift_logodds``,
        ``bias_target``, ``incremental_conversions``, ``counterfactual_conversions`` (and
        ``lift_naive`` with an unexposed arm), the population's ``lift_mean``, ``lift_sd`` and
        ``group_sd`` where sampled.
    corrected : bool
        False when no campaign has a placebo outcome: no bias-corrected quantity and no pooled rows.
    seed : int
        Seeds the new campaign's predictive draws.
    data : Dataset, optional
        The fit's constant data; its users and target conversions by campaign become the
        constants :data:`USER_COUNTS` by unit (the portfolio's are the sums; a new campaign has none).
    """
    post = posterior
    camps = [str(c) for c in post.campaign.values]
    ch, dr = post.sizes["chain"], post.sizes["draw"]
    pooled = corrected and "lift_mean" in post and len(camps) > 1
    units = camps + ([PORTFOLIO, NEW_CAMPAIGN] if pooled else [PORTFOLIO] if corrected else [])
    kinds = ["campaign"] * len(camps) + (["portfolio", "new campaign"] if pooled else ["portfolio"] if corrected else [])
    U = len(units)
    out = {}

    def blank():
        return np.full((ch, dr, U), np.nan)

    names = [q for q in _PER_CAMPAIGN if q in post] + (["bias"] if "bias_target" in post else [])
    if not corrected:
        names = [q for q in names if q in ("lift_uncorrected", "lift_naive")]
    for q in names:
        a = blank()
        a[..., :len(camps)] = post["bias_target" if q == "bias" else q].values
        out[q] = a
    if corrected:
        inc = post["incremental_conversions"].values.sum(axis=-1)
        cf = post["counterfactual_conversions"].values.sum(axis=-1)
        P = len(camps)
        out["incremental_conversions"][..., P] = inc
        out["counterfactual_conversions"][..., P] = cf
        with np.errstate(divide="ignore", invalid="ignore"):
            out["lift"][..., P] = inc / cf
        if pooled:
            rng = np.random.default_rng(seed + 2)
            ln = post["lift_mean"].values + post["lift_sd"].values * rng.standard_normal((ch, dr))
            if "group_sd" in post:  # a new campaign's group is unknown: its effect is a fresh draw too
                ln = ln + post["group_sd"].values * rng.standard_normal((ch, dr))
            out["lift_logodds"][..., P + 1] = ln
            out["lift"][..., P + 1] = np.expm1(ln)
    ds = xr.Dataset({q: (("chain", "draw", "unit"), v) for q, v in out.items()},
                    coords={"chain": post.chain.values, "draw": post.draw.values, "unit": units,
                            "kind": ("unit", kinds)})
    if data is not None and all(k in data for k in USER_COUNTS):
        for k in USER_COUNTS:
            v = np.full(U, np.nan)
            v[:len(camps)] = data[k].sel(campaign=camps).to_numpy().astype(float)
            if corrected:
                v[len(camps)] = v[:len(camps)].sum()
            ds[k] = ("unit", v)
    ds.attrs["corrected"] = int(corrected)
    return ds


def add_money(ds: xr.Dataset, spend: pd.DataFrame) -> xr.Dataset:
    """``ds`` with spend, incremental revenue and return on ad spend added (a new Dataset).

    Parameters
    ----------
    spend : DataFrame
        ``campaign, spend[, value_per_conversion]`` (checked by the caller). The portfolio's spend is
        the sum over the campaigns that have one; its revenue needs a value for each of them.

    Notes
    -----
    The cost per incremental conversion is not stored as draws: it is spend over incremental
    conversions, a decreasing map, so its quantiles are spend over the incremental conversions'
    opposite quantiles (:func:`cost_per_incremental`), unbounded where those are zero or below.
    """
    ds = ds.copy()
    if "incremental_conversions" not in ds:
        return ds
    units = [str(u) for u in ds.unit.values]
    kind = ds["kind"].values
    sp = spend.set_index("campaign")
    s_map = sp["spend"].astype(float).to_dict()
    v_map = sp["value_per_conversion"].astype(float).dropna().to_dict() if "value_per_conversion" in sp else {}
    inc = ds["incremental_conversions"].values
    spend_u = np.full(len(units), np.nan)
    rev = np.full(inc.shape, np.nan)
    spent = [i for i, u in enumerate(units) if kind[i] == "campaign" and u in s_map]
    for i in spent:
        spend_u[i] = s_map[units[i]]
        if units[i] in v_map:
            rev[..., i] = inc[..., i] * v_map[units[i]]
    inc_spent = np.full(inc.shape[:2], np.nan)
    if PORTFOLIO in units and spent:
        p = units.index(PORTFOLIO)
        spend_u[p] = float(sum(spend_u[i] for i in spent))
        inc_spent = inc[..., spent].sum(axis=-1)
        if all(units[i] in v_map for i in spent):
            rev[..., p] = rev[..., spent].sum(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        roas = np.where(spend_u > 0, rev / np.where(spend_u > 0, spend_u, 1.0), np.nan)
    vpc_u = np.array([v_map.get(u, np.nan) if kind[i] == "campaign" and u in s_map else np.nan
                      for i, u in enumerate(units)])
    ds["spend"] = ("unit", spend_u)
    ds["value_per_conversion"] = ("unit", vpc_u)
    ds["incremental_revenue"] = (("chain", "draw", "unit"), rev)
    ds["return_on_ad_spend"] = (("chain", "draw", "unit"), roas)
    # the incremental conversions the portfolio's spend bought (campaigns with a spend only)
    ds["incremental_conversions_spent"] = (("chain", "draw"), inc_spent)
    ds.attrs["spend_campaigns"] = len(spent)
    ds.attrs["campaigns_without_spend"] = ", ".join(u for i, u in enumerate(units) if kind[i] == "campaign"
                                                    and i not in spent)
    return ds


def cost_per_incremental(spend: float, inc_quantiles: tuple[float, float, float]) -> tuple[float, float, float]:
    """(median, lower, upper) cost per incremental conversion from the (median, lower, upper) of the
    incremental conversions: ``spend / q`` at the opposite quantile, ``inf`` (not bounded) where the
    incremental conversions' quantile is zero or below."""
    med, lo, hi = inc_quantiles

    def f(q):
        return spend / q if q > 0 else np.inf

    return f(med), f(hi), f(lo)


def _quantiles(x: np.ndarray, level: float) -> tuple[float, float, float, float]:
    x = x[np.isfinite(x)]
    if x.size == 0:
        return (np.nan,) * 4
    a = (1 - level) / 2
    lo, med, hi = np.quantile(x, [a, 0.5, 1 - a])
    return float(x.mean()), float(med), float(lo), float(hi)


def summarize(ds: xr.Dataset, level: float) -> pd.DataFrame:
    """The tidy summary of :func:`estimand_draws` (and :func:`add_money`) at ``level``.

    Returns
    -------
    DataFrame
        ``campaign, kind, quantity, mean, median, lower, upper, level`` (``campaign`` holds the unit;
        equal-tailed intervals). Probabilities (:data:`PROBABILITIES`) are rows whose ``mean`` is
        the probability. The cost per incremental conversion is mapped from the incremental
        conversions' quantiles (``inf``: not bounded).
    """
    rows = []
    units = [str(u) for u in ds.unit.values]
    kinds = [str(k) for k in ds["kind"].values]
    has_spend = "spend" in ds
    for i, (u, k) in enumerate(zip(units, kinds, strict=True)):
        base = {"campaign": u, "kind": k, "level": level}
        for q in QUANTITIES:
            if q == "spend":
                if has_spend and np.isfinite(ds["spend"].values[i]):
                    v = float(ds["spend"].values[i])
                    rows.append({**base, "quantity": q, "mean": v, "median": v, "lower": v, "upper": v})
                continue
            if q == "cost_per_incremental_conversion":
                if has_spend and np.isfinite(ds["spend"].values[i]):
                    inc = (ds["incremental_conversions_spent"].values if k == "portfolio"
                           else ds["incremental_conversions"].values[..., i]).ravel()
                    _, med, lo, hi = _quantiles(inc, level)
                    c_med, c_lo, c_hi = cost_per_incremental(float(ds["spend"].values[i]), (med, lo, hi))
                    rows.append({**base, "quantity": q, "mean": np.nan, "median": c_med, "lower": c_lo, "upper": c_hi})
                continue
            if q not in ds:
                continue
            x = ds[q].values[..., i].ravel()
            if not np.isfinite(x).any():
                continue
            mean, med, lo, hi = _quantiles(x, level)
            rows.append({**base, "quantity": q, "mean": mean, "median": med, "lower": lo, "upper": hi})
        for p, (of, thr, _) in PROBABILITIES.items():
            if of in ds:
                x = ds[of].values[..., i].ravel()
                if np.isfinite(x).any():
                    rows.append({**base, "quantity": p, "mean": float(np.mean(x[np.isfinite(x)] > thr)),
                                 "median": np.nan, "lower": np.nan, "upper": np.nan})
    return pd.DataFrame(rows, columns=SUMMARY_COLUMNS)


def interval(draws: np.ndarray, level: float) -> tuple[float, float]:
    """Equal-tailed interval of draws at ``level``."""
    a = (1 - level) / 2
    lo, hi = np.quantile(np.asarray(draws, dtype=float).ravel(), [a, 1 - a])
    return float(lo), float(hi)


def placebo_summary(idata, level: float) -> pd.DataFrame:
    """Each placebo's seen-vs-unseen effect (log odds) before and after the bias correction."""
    cd = idata.constant_data
    post = idata.posterior
    roles = cd["pair_role"].values.astype(str)
    rows = []
    L = int(round(level * 100))
    for i in np.flatnonzero(roles == "placebo"):
        pair = str(cd["pair"].values[i])
        camp, outcome = str(cd["pair_campaign"].values[i]), str(cd["pair_outcome"].values[i])
        if "effect" in post:
            before = post["effect"].isel(pair=i).values.ravel()
            after = before - post["bias"].sel(campaign=camp).values.ravel()
            if "outcome_bias" in post:  # the correction includes the outcome's own bias when it is modelled
                after = after - post["outcome_bias"].sel(outcome=outcome).values.ravel()
        else:  # quick mode: the estimate with its standard error, then minus the portfolio bias
            rng = np.random.default_rng(i)
            est, se = float(cd["pair_estimate"].values[i]), float(cd["pair_std_error"].values[i])
            before = rng.normal(est, se, 4000)
            bm = post["bias_mean"].values.ravel() if "bias_mean" in post else np.zeros(1)
            after = before - rng.choice(bm, 4000)
        blo, bhi = interval(before, level)
        alo, ahi = interval(after, level)
        rows.append({"campaign": camp, "placebo outcome": outcome, "pair": pair,
                     "before correction, median (log odds)": float(np.median(before)),
                     f"before, {L}% lower": blo, f"before, {L}% upper": bhi,
                     "after correction, median (log odds)": float(np.median(after)),
                     f"after, {L}% lower": alo, f"after, {L}% upper": ahi,
                     "before excludes zero": bool(blo > 0 or bhi < 0), "after excludes zero": bool(alo > 0 or ahi < 0)})
    return pd.DataFrame(rows)


def shrinkage_summary(idata, level: float) -> pd.DataFrame:
    """Each campaign alone (its target estimate minus its own placebos' mean) versus pooled."""
    cd = idata.constant_data
    post = idata.posterior
    est = pd.DataFrame({"campaign": cd["pair_campaign"].values.astype(str), "role": cd["pair_role"].values.astype(str),
                        "estimate": cd["pair_estimate"].values, "se": cd["pair_std_error"].values})
    pooled_bias = float(post["bias_mean"].mean()) if "bias_mean" in post else 0.0
    rows = []
    for c in [str(x) for x in post.campaign.values]:
        e = est[est.campaign == c]
        t = e[e.role == "target"].iloc[0]
        pl = e[e.role == "placebo"]
        b, bse = (float(pl.estimate.mean()), float(np.sqrt((pl.se**2).sum()) / len(pl))) if len(pl) else (pooled_bias, 0.0)
        pooled = post["lift_logodds"].sel(campaign=c).values.ravel()
        lo, hi = interval(pooled, level)
        rows.append({"campaign": c, "alone (log odds)": float(t.estimate - b),
                     "alone standard error": float(np.hypot(t.se, bse)),
                     "pooled, median (log odds)": float(np.median(pooled)), "pooled lower": lo, "pooled upper": hi,
                     "target conversions": int(cd["target_conversions_seen"].sel(campaign=c)
                                               + cd["target_conversions_unseen"].sel(campaign=c)),
                     "own placebos": int(len(pl))})
    return pd.DataFrame(rows)
