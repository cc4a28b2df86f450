"""Calibration checks: simulation-based calibration of the pooling step and leave-one-placebo-out.

Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari, Gelman 2018,
arXiv:1804.06788): draw parameters from the prior, data from the model, fit;
the rank of each prior draw among its posterior draws is uniform over
replications when the inference is correct.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from liftpool.models.pooling import PoolingPrior, pool
from liftpool.models.quick import stratified_estimates

__all__ = ["sbc_pooling", "rank_uniformity", "leave_one_placebo_out"]


def sbc_pooling(n_reps: int = 400, n_units: int = 6, n_draws: int = 99, prior: PoolingPrior | None = None,
                seed: int = 0, se=None) -> pd.DataFrame:
    """SBC ranks of mu, tau and theta[0] for the normal-normal pooling step.

    Returns
    -------
    DataFrame
        One row per replication: ``rank_mu, rank_tau, rank_theta0`` in 0..n_draws.
    """
    prior = prior or PoolingPrior(0.0, 1.0, 0.5, "halfnormal")
    rng = np.random.default_rng(seed)
    s = np.asarray(se if se is not None else np.linspace(0.2, 0.8, n_units), dtype=float)
    rows = []
    for _ in range(n_reps):
        mu = rng.normal(prior.mu_loc, prior.mu_scale)
        tau = abs(rng.normal(0, prior.tau_scale)) if prior.tau_family == "halfnormal" else abs(
            stats.cauchy.rvs(scale=prior.tau_scale, random_state=rng))
        theta = rng.normal(mu, tau, size=s.size)
        y = rng.normal(theta, s)
        post = pool(y, s, prior, n_draws=n_draws, seed=rng, n_grid=800)
        rows.append({"rank_mu": int((post.mu < mu).sum()), "rank_tau": int((post.tau < tau).sum()),
                     "rank_theta0": int((post.theta[:, 0] < theta[0]).sum())})
    return pd.DataFrame(rows)


def rank_uniformity(ranks: np.ndarray, n_draws: int, n_bins: int = 10) -> float:
    """Chi-square p-value that SBC ranks (0..n_draws) are uniform, over ``n_bins`` equal bins."""
    ranks = np.asarray(ranks)
    edges = np.linspace(0, n_draws + 1, n_bins + 1)
    counts, _ = np.histogram(ranks, bins=edges)
    return float(stats.chisquare(counts).pvalue)


def leave_one_placebo_out(counts: pd.DataFrame, level: float = 0.9, prior: PoolingPrior | None = None,
                          seed: int = 0) -> pd.DataFrame:
    """For each placebo: fit the bias distribution without it and predict its estimate.

    The predictive for a left-out placebo is N(mu_b, sigma_b^2 + s^2) mixed over the
    posterior of (mu_b, sigma_b).  Over many placebos the intervals should cover their
    estimates at about ``level``.

    Returns
    -------
    DataFrame
        ``campaign, outcome, estimate, lower, upper, covered``.
    """
    prior = prior or PoolingPrior(0.0, 0.5, float(np.hypot(0.25, 0.15)), "halfnormal")
    est = stratified_estimates(counts)
    pl = est[est["role"] == "placebo"].reset_index(drop=True)
    rng = np.random.default_rng(seed)
    a = (1 - level) / 2
    rows = []
    for i in range(len(pl)):
        rest = pl.drop(index=i)
        if len(rest) < 2:
            continue
        post = pool(rest["log_or"].to_numpy(), rest["se"].to_numpy(), prior, n_draws=4000, seed=rng)
        pred = rng.normal(post.mu, np.sqrt(post.tau**2 + pl.loc[i, "se"] ** 2))
        lo, hi = np.quantile(pred, [a, 1 - a])
        y = pl.loc[i, "log_or"]
        rows.append({"campaign": pl.loc[i, "campaign"], "outcome": pl.loc[i, "outcome"], "estimate": y,
                     "lower": lo, "upper": hi, "covered": bool(lo <= y <= hi)})
    return pd.DataFrame(rows)
