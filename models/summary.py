"""The tidy summary's shape and the pooled rows' names (the summary itself is
:func:`liftpool.models.estimands.summarize`).

Columns ``campaign, kind, quantity, mean, median, lower, upper, level``.
Intervals are equal-tailed (the ``level`` central quantiles): they read the
same way for every quantity and do not depend on the scale.  Pooled rows use
the campaign names ``(portfolio)`` and ``(new campaign)``.
"""

from __future__ import annotations

import numpy as np

from liftpool.data_prep.counts import RESERVED_CAMPAIGNS

__all__ = ["prior_lift_quantiles", "SUMMARY_COLUMNS", "PORTFOLIO", "NEW_CAMPAIGN"]

SUMMARY_COLUMNS = ["campaign", "kind", "quantity", "mean", "median", "lower", "upper", "level"]
PORTFOLIO, NEW_CAMPAIGN = RESERVED_CAMPAIGNS  # data_prep refuses them as campaign names
#: Quantiles of the prior predictive relative lift stored with every full fit.
PRIOR_QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)


def prior_lift_quantiles(x: np.ndarray) -> dict:
    """``{"lift_prior_quantiles": {"q05": ..., ...}}`` of prior relative-lift draws (non-finite dropped)."""
    x = np.asarray(x, dtype=float).ravel()
    q = np.quantile(x[np.isfinite(x)], PRIOR_QUANTILES)
    return {"lift_prior_quantiles": {f"q{int(p * 100):02d}": float(v) for p, v in zip(PRIOR_QUANTILES, q, strict=True)}}
