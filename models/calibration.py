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

__all__ = ["sbc_pooling", "rank_uniformity", "leave_one_placebo_out", "oracle_lift"]


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


def oracle_lift(counts: pd.DataFrame, spreads: dict[str, float], level: float = 0.9, n_draws: int = 4000,
                seed: int = 0, settings=None) -> pd.DataFrame:
    """Lift intervals (log odds) of the model with its spreads fixed at known values: an oracle.

    The quick mode's structure on the same conditional curves, with ``bias_sd``, ``residual_sd`` and
    ``lift_sd`` held at ``spreads`` instead of learned; a known-truth check compares a fit's
    interval widths with these (docs/validation.md).

    Returns
    -------
    DataFrame
        ``campaign, median, lower, upper`` of the lift (log odds).
    """
    from liftpool.models.completion import split_lift
    from liftpool.models.conditional import build_curves, cell_tables
    from liftpool.models.design import make_design
    from liftpool.models.gaussian import gaussian_posterior
    from liftpool.models.settings import ModelSettings

    s = settings or ModelSettings()
    d = make_design(counts)
    curves = build_curves(cell_tables(d), len(d.pair_campaign))
    se = np.where(curves.informative, 1.0 / np.sqrt(np.maximum(curves.information, 1e-300)), np.inf)
    rng = np.random.default_rng(seed)
    q = gaussian_posterior(curves.mode, se, curves.informative, d.pair_campaign, d.target_pair(), s, n_draws,
                           rng, fixed_spreads=spreads)
    x = q["target_excess"]
    sr = q["residual_sd"][:, None] if q["corrected"] else 0.0
    if q["single"]:
        centre, sl = 0.0, s.lift_mean_scale
    else:
        centre, sl = q["lift_mean"][:, None], q["lift_sd"][:, None]
    lift = split_lift(x, centre, sl, sr, rng.standard_normal(x.shape))
    a = (1 - level) / 2
    lo, med, hi = np.quantile(lift, [a, 0.5, 1 - a], axis=0)
    return pd.DataFrame({"campaign": d.campaigns, "median": med, "lower": lo, "upper": hi})
