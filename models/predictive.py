"""Prior and posterior predictive checks of the full model."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pymc as pm

from liftpool.models.design import Design
from liftpool.models.summary import prior_lift_quantiles

__all__ = ["posterior_predictive_check", "prior_predictive_lift"]


def posterior_predictive_check(d: Design, model: pm.Model, idata, level: float, seed: int,
                               n_draws: int = 1000) -> pd.DataFrame:
    """Observed conversions by (campaign, outcome, arm) against their posterior predictive interval.

    Returns
    -------
    DataFrame
        ``campaign, outcome, arm, observed, predicted_median, lower, upper, inside, p_value`` where
        ``p_value`` is the posterior predictive probability of a total at least as large as observed.
    """
    post = idata.posterior
    n = post.sizes["chain"] * post.sizes["draw"]
    keep = np.linspace(0, post.sizes["draw"] - 1, max(1, n_draws // post.sizes["chain"])).astype(int)
    thin = idata.sel(draw=keep)
    with model:
        pp = pm.sample_posterior_predictive(thin, var_names=["conversions"], random_seed=seed, progressbar=False)
    sim = pp.posterior_predictive["conversions"].values.reshape(-1, len(d.users))
    camp = np.array(d.campaigns)[d.row_campaign]
    outc = np.array(d.outcomes)[d.pair_outcome[d.row_pair]]
    arm = np.where(d.row_seen == 1, "seen", "unseen")
    key = pd.Series(list(zip(camp, outc, arm, strict=True)))
    a = (1 - level) / 2
    rows = []
    for k, idx in key.groupby(key).groups.items():
        idx = np.asarray(idx)
        tot = sim[:, idx].sum(axis=1)
        obs = int(d.conversions[idx].sum())
        lo, med, hi = np.quantile(tot, [a, 0.5, 1 - a])
        rows.append({"campaign": k[0], "outcome": k[1], "arm": k[2], "observed": obs, "predicted_median": float(med),
                     "lower": float(lo), "upper": float(hi), "inside": bool(lo <= obs <= hi),
                     "p_value": float(np.mean(tot >= obs))})
    del n
    return pd.DataFrame(rows)


def prior_predictive_lift(model: pm.Model, seed: int, n_draws: int = 1000) -> dict:
    """What the priors alone imply for the relative lift (a check that they are weakly informative)."""
    with model:
        prior = pm.sample_prior_predictive(draws=n_draws, var_names=["lift"], random_seed=seed)
    return prior_lift_quantiles(prior.prior["lift"].values)
