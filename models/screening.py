"""Confounder screening, model side: the quick mode's pooled placebo effect for a counts table.

The placebo (negative-control) outcomes cannot be caused by the ad, so their pooled
seen-versus-unseen effect measures the bias left after stratifying on the cells
(Lipsitch, Tchetgen Tchetgen & Cohen 2010, Epidemiology 21(3)).  It is computed exactly as the
quick mode does: Mantel-Haenszel log odds ratios per (campaign, placebo), pooled by the exact
normal-normal step with the quick mode's priors.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from liftpool.models.pooling import pool
from liftpool.models.quick import quick_bias_prior, stratified_estimates
from liftpool.models.settings import ModelSettings

__all__ = ["PlaceboBias", "placebo_bias"]


@dataclass(frozen=True)
class PlaceboBias:
    """The pooled placebo effect (log odds) of one cell choice.

    Attributes
    ----------
    mean, sd : float
        Posterior mean and sd of the portfolio's mean placebo effect (0 is no bias).
    spread : float
        Posterior mean of the spread of placebo effects across campaigns and outcomes.
    n_estimates : int
        Placebo (campaign, outcome) estimates pooled.
    """

    mean: float
    sd: float
    spread: float
    n_estimates: int


def placebo_bias(counts: pd.DataFrame, settings: ModelSettings | None = None) -> PlaceboBias:
    """The quick mode's pooled placebo effect of a counts table.

    Parameters
    ----------
    counts : DataFrame
        A counts table (``campaign, cell, arm, outcome, role, users, conversions``).
    settings : ModelSettings, optional
        Supplies the bias priors and the seed (defaults otherwise).

    Returns
    -------
    PlaceboBias

    Raises
    ------
    ValueError
        When the counts have no placebo outcome.
    """
    s = settings or ModelSettings()
    est = stratified_estimates(counts)
    pl = est[est["role"] == "placebo"]
    if pl.empty:
        raise ValueError("the counts have no placebo outcome: nothing measures the bias")
    post = pool(pl["log_or"].to_numpy(), pl["se"].to_numpy(), quick_bias_prior(s), n_draws=4000, seed=s.seed)
    exact = post.exact_means()
    w = post.tau_weights
    mu_var = float(w @ (post.mu_var + post.mu_mean**2) - exact["mu"] ** 2)
    return PlaceboBias(mean=float(exact["mu"]), sd=float(np.sqrt(max(mu_var, 0.0))), spread=float(exact["tau"]),
                       n_estimates=int(len(pl)))
