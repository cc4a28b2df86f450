"""The tidy summary: one row per campaign and quantity.

Columns ``campaign, quantity, mean, median, lower, upper, level``.
Intervals are equal-tailed (the ``level`` central quantiles): they read the
same way for every quantity and do not depend on the scale.  Pooled rows use
the campaign names ``(portfolio)`` and ``(new campaign)``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["summarize_draws", "prior_lift_quantiles", "SUMMARY_COLUMNS", "PORTFOLIO", "NEW_CAMPAIGN", "QUANTITIES"]

SUMMARY_COLUMNS = ["campaign", "quantity", "mean", "median", "lower", "upper", "level"]
PORTFOLIO = "(portfolio)"
NEW_CAMPAIGN = "(new campaign)"
QUANTITIES = ("lift", "lift_uncorrected", "lift_naive", "incremental_conversions", "bias", "lift_logodds",
              "p_lift_positive")


def _row(campaign: str, quantity: str, draws: np.ndarray, level: float) -> dict:
    draws = np.asarray(draws, dtype=float).ravel()
    a = (1 - level) / 2
    lo, med, hi = np.quantile(draws, [a, 0.5, 1 - a])
    return {"campaign": campaign, "quantity": quantity, "mean": float(draws.mean()), "median": float(med),
            "lower": float(lo), "upper": float(hi), "level": level}


def summarize_draws(per_campaign: dict[str, dict[str, np.ndarray]], pooled: dict[str, dict[str, np.ndarray]],
                    level: float) -> pd.DataFrame:
    """Long summary from draws.

    Parameters
    ----------
    per_campaign : dict
        Quantity name to {campaign: draws}.
    pooled : dict
        Pseudo-campaign name to {quantity: draws}.
    level : float
    """
    rows = []
    campaigns = sorted({c for q in per_campaign.values() for c in q})
    for c in campaigns:
        for q in QUANTITIES:
            if q == "p_lift_positive":
                src = per_campaign.get("lift")
                if src and c in src:
                    rows.append({"campaign": c, "quantity": q, "mean": float(np.mean(np.asarray(src[c]) > 0)),
                                 "median": np.nan, "lower": np.nan, "upper": np.nan, "level": level})
                continue
            if q in per_campaign and c in per_campaign[q]:
                rows.append(_row(c, q, per_campaign[q][c], level))
    for name, qs in pooled.items():
        for q, d in qs.items():
            rows.append(_row(name, q, d, level))
    return pd.DataFrame(rows, columns=SUMMARY_COLUMNS)


#: Quantiles of the prior predictive relative lift stored with every full fit.
PRIOR_QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)


def prior_lift_quantiles(x: np.ndarray) -> dict:
    """``{"lift_prior_quantiles": {"q05": ..., ...}}`` of prior relative-lift draws (non-finite dropped)."""
    x = np.asarray(x, dtype=float).ravel()
    q = np.quantile(x[np.isfinite(x)], PRIOR_QUANTILES)
    return {"lift_prior_quantiles": {f"q{int(p * 100):02d}": float(v) for p, v in zip(PRIOR_QUANTILES, q, strict=True)}}
