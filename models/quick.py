"""Quick mode: seconds, no sampler, for screening.

1. Per (campaign, outcome): the Mantel-Haenszel log odds ratio of seen versus
   unseen across cells, with the Robins-Breslow-Greenland standard error.
2. The bias distribution from the placebo estimates: theta_i ~ N(mu_b, sigma_b^2 + s_i^2)
   (the systematic-error model of Schuemie et al. 2014), fitted by the exact
   normal-normal pooling step with weakly informative priors.
3. Each campaign's target estimate minus a draw of its bias, with se^2 + sigma_b^2,
   pooled across campaigns by the same pooling step, draw by draw, so the
   uncertainty of the bias reaches every interval.

The quick mode treats the bias as one distribution for the portfolio (it does
not give a campaign its own bias from its own placebos); the full model does.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import expit, logit

from liftpool.models.design import Design
from liftpool.models.pooling import PoolingPrior, pool
from liftpool.models.settings import ModelSettings

__all__ = ["mantel_haenszel", "stratified_estimates", "QuickResult", "quick_fit", "quick_bias_prior"]


def mantel_haenszel(a, b, c, d) -> tuple[float, float]:
    """Mantel-Haenszel pooled log odds ratio and its Robins-Breslow-Greenland standard error.

    Parameters
    ----------
    a, b, c, d : array_like
        Per stratum: exposed with event, exposed without, unexposed with, unexposed without.
        When the pooled numerator or denominator is zero, 0.5 is added to every cell.

    Returns
    -------
    log_or, se : float
    """
    a, b, c, d = (np.asarray(x, dtype=float) for x in (a, b, c, d))
    n = a + b + c + d
    keep = n > 0
    a, b, c, d, n = a[keep], b[keep], c[keep], d[keep], n[keep]
    R, S = a * d / n, b * c / n
    if R.sum() == 0 or S.sum() == 0:
        a, b, c, d = a + 0.5, b + 0.5, c + 0.5, d + 0.5
        n = a + b + c + d
        R, S = a * d / n, b * c / n
    P, Q = (a + d) / n, (b + c) / n
    sR, sS = R.sum(), S.sum()
    var = (P * R).sum() / (2 * sR**2) + (P * S + Q * R).sum() / (2 * sR * sS) + (Q * S).sum() / (2 * sS**2)
    return float(np.log(sR / sS)), float(np.sqrt(var))


def stratified_estimates(counts: pd.DataFrame) -> pd.DataFrame:
    """Per (campaign, outcome): ``campaign, outcome, role, log_or, se, conversions, users``."""
    ex = counts[counts["arm"].isin(["seen", "unseen"])]
    rows = []
    for (camp, outcome, role), g in ex.groupby(["campaign", "outcome", "role"], sort=True):
        w = g.pivot_table(index="cell", columns="arm", values=["users", "conversions"], aggfunc="sum", fill_value=0)
        xs, ns = w[("conversions", "seen")].to_numpy(), w[("users", "seen")].to_numpy()
        xu, nu = w[("conversions", "unseen")].to_numpy(), w[("users", "unseen")].to_numpy()
        lo, se = mantel_haenszel(xs, ns - xs, xu, nu - xu)
        rows.append({"campaign": camp, "outcome": outcome, "role": role, "log_or": lo, "se": se,
                     "conversions": int(xs.sum() + xu.sum()), "users": int(ns.sum() + nu.sum())})
    return pd.DataFrame(rows)


@dataclass
class QuickResult:
    """Draws of the quick mode (iid, no chains)."""

    estimates: pd.DataFrame
    lift_logodds: np.ndarray  # (D, C)
    lift_uncorrected_logodds: np.ndarray  # (D, C)
    bias: np.ndarray  # (D, C)
    lift_mean: np.ndarray
    lift_sd: np.ndarray
    lift_new: np.ndarray
    bias_mean: np.ndarray | None
    bias_sd: np.ndarray | None


def quick_bias_prior(s: ModelSettings) -> PoolingPrior:
    """The quick mode's prior for pooling placebo estimates (the portfolio's bias distribution)."""
    return PoolingPrior(0.0, s.bias_mean_scale, float(np.hypot(s.bias_sd_scale, s.residual_sd_scale)), "halfnormal")


def quick_fit(d: Design, s: ModelSettings, n_draws: int = 4000) -> QuickResult:
    """Fit the quick mode on a design."""
    rng = np.random.default_rng(s.seed)
    est = stratified_estimates(d.counts)
    tgt = est[est["role"] == "target"].set_index("campaign").loc[d.campaigns]
    t, st = tgt["log_or"].to_numpy(), tgt["se"].to_numpy()
    pl = est[est["role"] == "placebo"]
    lift_prior = PoolingPrior(0.0, s.lift_mean_scale, s.lift_sd_scale, "halfnormal")
    C = len(t)
    unc = rng.normal(t, st, size=(n_draws, C))
    if len(pl) == 0:
        post = pool(t, st, lift_prior, n_draws=n_draws, seed=rng)
        return QuickResult(est, post.theta, unc, np.zeros((n_draws, C)), post.mu, post.tau, post.new, None, None)
    bias_prior = quick_bias_prior(s)
    bpost = pool(pl["log_or"].to_numpy(), pl["se"].to_numpy(), bias_prior, n_draws=n_draws, seed=rng)
    per = 10
    J = max(1, n_draws // per)
    lifts, mus, taus, news, biases = [], [], [], [], []
    for j in range(J):
        mb, sb = bpost.mu[j], bpost.tau[j]
        y = t - mb
        se = np.sqrt(st**2 + sb**2)
        p = pool(y, se, lift_prior, n_draws=per, seed=rng, n_grid=300)
        lifts.append(p.theta)
        mus.append(p.mu)
        taus.append(p.tau)
        news.append(p.new)
        biases.append(rng.normal(mb, sb, size=(per, C)))
    return QuickResult(est, np.vstack(lifts), unc[: J * per], np.vstack(biases), np.concatenate(mus),
                       np.concatenate(taus), np.concatenate(news), bpost.mu, bpost.tau)


def quick_relative(d: Design, delta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Relative lift, incremental and counterfactual conversions among seen users, for log-odds shifts.

    Uses each target cell's observed seen rate (with a half-count smoothing) as the
    with-ad rate and removes ``delta`` on the log-odds scale for the without-ad rate.

    Parameters
    ----------
    delta : ndarray, shape (D, C)
    """
    ex = d.counts[(d.counts["role"] == "target") & (d.counts["arm"] == "seen")]
    D, C = delta.shape
    lift = np.empty((D, C))
    inc = np.empty((D, C))
    cf = np.empty((D, C))
    for ci, camp in enumerate(d.campaigns):
        g = ex[ex["campaign"] == camp]
        n = g["users"].to_numpy(float)
        p = (g["conversions"].to_numpy(float) + 0.5) / (n + 1.0)
        with_ad = (n * p).sum()
        without = (n[None, :] * expit(logit(p)[None, :] - delta[:, ci : ci + 1])).sum(axis=1)
        lift[:, ci] = with_ad / without - 1
        inc[:, ci] = with_ad - without
        cf[:, ci] = without
    return lift, inc, cf
