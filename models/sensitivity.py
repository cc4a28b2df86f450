"""Tipping points: how much extra target-only bias each conclusion survives.

The correction assumes the target's bias is its placebos' (up to the learned outcome-to-outcome
spread, and the excess bias the randomized tests reveal, when there are any).  Suppose the target's
own bias is larger by ``delta`` on the log-odds scale, in every draw.  Then the without-ad rate of
the seen users is ``expit(logit(p0) + delta)`` instead of ``p0``, and with it the incremental
conversions and the lift move (computed on the campaign's pooled rate ``p0 = counterfactual / seen
users``; exact for one cell and, for rates of a few percent, within a small fraction of the shift
otherwise).  This is tipping-point analysis: the value of the unverifiable bias at which a
conclusion flips.  For each campaign (``delta`` on that campaign) and the portfolio (the same
``delta`` on every campaign):

* ``tip_interval``: the ``delta`` at which the lower end of the lift's interval reaches 0;
* ``tip_positive``: the ``delta`` at which P(lift > 0) falls below 0.5;
* ``tip_paid``: the ``delta`` at which the chance of paying for itself falls below 0.5 (with a spend
  and a value per conversion).

Each draw has its own ``delta*`` at which its lift is exactly 0; the first two tipping points are
that draw-wise ``delta*``'s lower quantile and median (the lift moves monotonically with ``delta``
in every draw), so no search is needed for a campaign.  A negative tipping point means the
conclusion does not hold even with no extra bias (the interval already includes 0).  Dividing by
the learned ``residual_sd`` gives the same points in units of how much the bias differs between
one outcome and another.

The related measure on the risk-ratio scale is the E-value (VanderWeele & Ding 2017, Annals of
Internal Medicine 167(4)): :func:`e_value`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr
from scipy.special import expit, logit

__all__ = ["tipping_points", "shifted_lift", "sensitivity_curve", "e_value", "TIP_COLUMNS", "TIP_MEANINGS",
           "TIP_RANGE"]

#: The search range of the portfolio's tipping points (log odds); beyond it a point is reported as +-inf.
TIP_RANGE = 5.0
#: Each tipping-point column's meaning (the report's definitions sheet and glossary read it here).
TIP_MEANINGS = {
    "tip_interval": "extra target-only bias (log odds) at which the lower end of the lift's interval reaches 0; "
                    "negative: the interval already includes 0",
    "tip_positive": "extra target-only bias (log odds) at which the chance of a positive lift falls below one half",
    "tip_paid": "extra target-only bias (log odds) at which the chance of paying for itself falls below one half",
    "tip_interval_spreads": "tip_interval in units of the learned outcome-to-outcome spread of the bias (residual_sd)",
    "tip_positive_spreads": "tip_positive in units of the learned outcome-to-outcome spread of the bias",
    "tip_paid_spreads": "tip_paid in units of the learned outcome-to-outcome spread of the bias",
    "e_value": "E-value of the median lift read as a risk ratio (VanderWeele & Ding 2017)",
    "e_value_interval": "E-value of the lift's lower interval end read as a risk ratio (1 when it includes no effect)",
}
TIP_COLUMNS = ["campaign", "kind", "tip_interval", "tip_positive", "tip_paid", "tip_interval_spreads",
               "tip_positive_spreads", "tip_paid_spreads", "e_value", "e_value_interval"]


def e_value(rr) -> np.ndarray:
    """E-value of a risk ratio (VanderWeele & Ding 2017): ``RR + sqrt(RR (RR - 1))``; ``1/RR`` below 1.

    The minimum strength of association, as a risk ratio, that an unmeasured confounder would need
    with both the exposure and the outcome to explain the observed risk ratio away.
    """
    rr = np.asarray(rr, dtype=float)
    r = np.where(rr < 1, 1.0 / np.where(rr > 0, rr, np.nan), rr)
    return r + np.sqrt(r * (r - 1.0))


def _parts(ds: xr.Dataset, units: list[int]):
    """Seen conversions as observed ``S``, counterfactual ``cf`` (draws, units) and seen users ``n``."""
    inc = ds["incremental_conversions"].values.reshape(-1, ds.sizes["unit"])[:, units]
    cf = ds["counterfactual_conversions"].values.reshape(-1, ds.sizes["unit"])[:, units]
    n = ds["users_seen"].values[units].astype(float)
    return inc + cf, cf, n


def _shift(S, cf, n, delta):
    """Counterfactual conversions with the without-ad log odds raised by ``delta``."""
    p0 = np.clip(cf / n, 1e-12, 1 - 1e-12)
    return n * expit(logit(p0) + delta)


def shifted_lift(ds: xr.Dataset, unit: str, delta) -> np.ndarray:
    """Draws of the lift (fraction) of ``unit`` with extra target bias ``delta`` (every campaign for the portfolio)."""
    units, _ = _members(ds, unit)
    S, cf, n = _parts(ds, units)
    cf2 = _shift(S, cf, n, delta)
    return S.sum(-1) / cf2.sum(-1) - 1.0


def _members(ds: xr.Dataset, unit: str) -> tuple[list[int], str]:
    names = [str(u) for u in ds.unit.values]
    kind = [str(k) for k in ds["kind"].values]
    i = names.index(unit)
    if kind[i] == "portfolio":
        return [j for j, k in enumerate(kind) if k == "campaign"], "portfolio"
    return [i], kind[i]


def _portfolio_roots(S, cf, n, target, w=None) -> np.ndarray:
    """Per draw, the ``delta`` at which sum_c w_c (S_c - cf_c(delta)) = target (bisection; +-inf outside
    the range; ``w`` 1 by default, the values per conversion for paying for itself)."""
    w = np.ones(S.shape[-1]) if w is None else w
    lo = np.full(S.shape[0], -TIP_RANGE)
    hi = np.full(S.shape[0], TIP_RANGE)

    def f(dl):
        return (w * (S - _shift(S, cf, n, dl[:, None]))).sum(-1) - target

    flo, fhi = f(lo), f(hi)
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        up = f(mid) > 0
        lo = np.where(up, mid, lo)
        hi = np.where(up, hi, mid)
    root = 0.5 * (lo + hi)
    root = np.where(flo <= 0, -np.inf, root)  # below 0 even with the bias far smaller
    return np.where(fhi > 0, np.inf, root)


def tipping_points(ds: xr.Dataset, level: float, residual_sd: float | None = None) -> pd.DataFrame:
    """Every campaign's and the portfolio's tipping points (rows of :data:`TIP_COLUMNS`).

    Parameters
    ----------
    ds : Dataset
        A fit's estimands (:func:`liftpool.models.estimands.estimand_draws`, with the user counts;
        with :func:`~liftpool.models.estimands.add_money` for ``tip_paid``).
    level : float
        The interval level (the lower end is the ``(1 - level) / 2`` quantile).
    residual_sd : float, optional
        The learned outcome-to-outcome spread (its posterior median); the ``*_spreads`` columns are
        the tipping points in its units.
    """
    a = (1 - level) / 2
    names = [str(u) for u in ds.unit.values]
    kind = [str(k) for k in ds["kind"].values]
    # paying for itself: the values per conversion of the campaigns with a spend (add_money), where the
    # unit has a revenue at all (the portfolio's needs a value for each campaign with a spend)
    paid_units = set()
    if "value_per_conversion" in ds:
        vpc = np.nan_to_num(ds["value_per_conversion"].values, nan=0.0)
        spend = ds["spend"].values
        rev = ds["incremental_revenue"].values.reshape(-1, ds.sizes["unit"])
        paid_units = {i for i in range(len(names)) if np.isfinite(spend[i]) and np.isfinite(rev[:, i]).any()}
    rows = []
    for i, (u, k) in enumerate(zip(names, kind, strict=True)):
        if k not in ("campaign", "portfolio"):
            continue
        units, _ = _members(ds, u)
        S, cf, n = _parts(ds, units)
        if k == "campaign":
            with np.errstate(divide="ignore", invalid="ignore"):
                star = logit(np.clip(S[:, 0] / n[0], 1e-12, 1 - 1e-12)) - logit(np.clip(cf[:, 0] / n[0], 1e-12, 1 - 1e-12))
        else:
            star = _portfolio_roots(S, cf, n, 0.0)
        star = star[~np.isnan(star)]
        row = {"campaign": u, "kind": k, "tip_interval": float(np.quantile(star, a)) if star.size else np.nan,
               "tip_positive": float(np.median(star)) if star.size else np.nan, "tip_paid": np.nan}
        if i in paid_units:
            if k == "campaign":
                with np.errstate(divide="ignore", invalid="ignore"):
                    need = spend[i] / vpc[i]  # incremental conversions that pay for the spend
                    rest = (S[:, 0] - need) / n[0]
                    paid = np.where(rest > 0, logit(np.clip(rest, 1e-12, 1 - 1e-12)) - logit(np.clip(cf[:, 0] / n[0], 1e-12, 1 - 1e-12)),
                                    -np.inf)
            else:  # revenue summed over the campaigns with a spend, each at its own value
                paid = _portfolio_roots(S, cf, n, spend[i], w=vpc[units])
            row["tip_paid"] = float(np.median(paid))
        lift_lo = float(np.quantile(S.sum(-1) / cf.sum(-1) - 1.0, a))
        lift_med = float(np.median(S.sum(-1) / cf.sum(-1) - 1.0))
        row["e_value"] = float(e_value(1.0 + lift_med)) if lift_med > -1 else np.nan
        row["e_value_interval"] = float(e_value(1.0 + lift_lo)) if lift_lo > 0 else 1.0
        for c in ("tip_interval", "tip_positive", "tip_paid"):
            row[c + "_spreads"] = row[c] / residual_sd if residual_sd and np.isfinite(row[c]) else (
                row[c] if not np.isfinite(row[c]) else np.nan)
        rows.append(row)
    return pd.DataFrame(rows, columns=TIP_COLUMNS)


def sensitivity_curve(ds: xr.Dataset, unit: str, level: float, deltas=None) -> pd.DataFrame:
    """The lift's median and interval as the extra target bias grows: ``delta, median, lower, upper``."""
    deltas = np.linspace(-0.1, 0.4, 26) if deltas is None else np.asarray(deltas, dtype=float)
    a = (1 - level) / 2
    rows = []
    for dl in deltas:
        x = shifted_lift(ds, unit, dl)
        x = x[np.isfinite(x)]
        lo, med, hi = np.quantile(x, [a, 0.5, 1 - a])
        rows.append({"delta": float(dl), "median": float(med), "lower": float(lo), "upper": float(hi)})
    return pd.DataFrame(rows)
