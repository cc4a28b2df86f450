"""Normal-normal hierarchical pooling: estimates and standard errors in, posterior out.

Pure NumPy.  The model is

    y_i ~ Normal(theta_i, s_i),  theta_i ~ Normal(mu, tau),
    mu ~ Normal(mu_loc, mu_scale),  tau ~ HalfCauchy(tau_scale)   (or HalfNormal)

and the posterior is computed exactly on a grid over tau, with mu and theta
integrated analytically given tau (Gelman et al., Bayesian Data Analysis 3rd
ed., section 5.4), so there is no sampler and no convergence to check.  Draws
are made by sampling tau from the grid (with jitter inside its cell), then mu
and theta from their conditional normals.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["PoolingPrior", "PoolingPosterior", "pool"]


@dataclass(frozen=True)
class PoolingPrior:
    """Priors of the pooling step.

    Parameters
    ----------
    mu_loc, mu_scale : float
        Normal prior on the population mean (``mu_scale=inf`` is flat).
    tau_scale : float
        Scale of the prior on the population spread.
    tau_family : {"halfcauchy", "halfnormal"}
    """

    mu_loc: float = 0.0
    mu_scale: float = 5.0
    tau_scale: float = 5.0
    tau_family: str = "halfcauchy"

    def log_tau_prior(self, tau: np.ndarray) -> np.ndarray:
        if self.tau_family == "halfcauchy":
            return stats.halfcauchy.logpdf(tau, scale=self.tau_scale)
        if self.tau_family == "halfnormal":
            return stats.halfnorm.logpdf(tau, scale=self.tau_scale)
        raise ValueError(f"unknown tau_family {self.tau_family!r}; valid: 'halfcauchy', 'halfnormal'")


@dataclass
class PoolingPosterior:
    """The exact grid posterior and draws from it.

    Attributes
    ----------
    tau_grid, tau_weights : ndarray
        Grid over tau and normalized posterior mass of each grid cell.
    mu_mean, mu_var : ndarray
        Conditional posterior of mu given each grid value of tau.
    mu, tau : ndarray, shape (n_draws,)
    theta : ndarray, shape (n_draws, n)
    new : ndarray, shape (n_draws,)
        Predictive draws for a new unit: Normal(mu, tau).
    """

    tau_grid: np.ndarray
    tau_weights: np.ndarray
    mu_mean: np.ndarray
    mu_var: np.ndarray
    theta_mean_given_tau: np.ndarray
    mu: np.ndarray
    tau: np.ndarray
    theta: np.ndarray
    new: np.ndarray

    def exact_means(self) -> dict[str, np.ndarray]:
        """Posterior means computed on the grid (no Monte Carlo error beyond the grid)."""
        w = self.tau_weights
        return {"mu": float(w @ self.mu_mean), "tau": float(w @ self.tau_grid),
                "theta": w @ self.theta_mean_given_tau}


def _grid(y: np.ndarray, s: np.ndarray, prior: PoolingPrior, n_grid: int) -> np.ndarray:
    spread = max(float(np.std(y)) * 4, float(np.max(s)) * 2, prior.tau_scale * 0.5, 1e-6)
    upper = max(spread, prior.tau_scale * (30 if prior.tau_family == "halfcauchy" else 5))
    # denser near zero, where the posterior of tau often piles up
    u = np.linspace(0.0, 1.0, n_grid + 1)[1:] - 0.5 / n_grid
    return upper * u**2


def pool(
    y,
    s,
    prior: PoolingPrior | None = None,
    n_draws: int = 4000,
    seed: int | np.random.Generator | None = 0,
    n_grid: int = 2000,
    fixed_tau: float | None = None,
) -> PoolingPosterior:
    """Partial pooling of estimates ``y`` with standard errors ``s``.

    Parameters
    ----------
    y, s : array_like, shape (n,)
        Estimates and their standard errors (s > 0).
    prior : PoolingPrior, optional
    n_draws : int
    seed : int or Generator
    n_grid : int
        Grid points over tau.
    fixed_tau : float, optional
        Fix tau at this value (``0`` is complete pooling).

    Returns
    -------
    PoolingPosterior
    """
    prior = prior or PoolingPrior()
    y = np.asarray(y, dtype=float)
    s = np.asarray(s, dtype=float)
    if y.ndim != 1 or y.shape != s.shape or y.size == 0:
        raise ValueError("y and s must be 1-d arrays of the same non-zero length")
    if not np.all(s > 0) or not np.all(np.isfinite(y)):
        raise ValueError("standard errors must be positive and estimates finite")
    rng = np.random.default_rng(seed)
    tau = np.array([float(fixed_tau)]) if fixed_tau is not None else _grid(y, s, prior, n_grid)
    v = s[None, :] ** 2 + tau[:, None] ** 2  # (G, n)
    prec = 1.0 / v
    p0 = 0.0 if not np.isfinite(prior.mu_scale) else 1.0 / prior.mu_scale**2
    mu_prec = prec.sum(axis=1) + p0
    mu_mean = ((prec * y).sum(axis=1) + p0 * prior.mu_loc) / mu_prec
    mu_var = 1.0 / mu_prec
    # log p(tau | y) = log p(tau) + log N(y | mu_loc, ...) marginalized over mu (BDA3 eq. 5.21 form)
    resid = y[None, :] - mu_mean[:, None]
    logp = (0.5 * np.log(mu_var) - 0.5 * np.log(v).sum(axis=1) - 0.5 * (resid**2 * prec).sum(axis=1))
    if p0:
        logp -= 0.5 * p0 * (mu_mean - prior.mu_loc) ** 2
    if fixed_tau is None:
        logp = logp + prior.log_tau_prior(tau)
        widths = np.gradient(tau)
        logp = logp + np.log(widths)
    w = np.exp(logp - logp.max())
    w /= w.sum()
    # theta | mu, tau, y ~ N((y/s^2 + mu/tau^2) / (1/s^2 + 1/tau^2), 1 / (...))
    with np.errstate(divide="ignore", invalid="ignore"):
        t_prec = 1.0 / s[None, :] ** 2 + 1.0 / tau[:, None] ** 2
        theta_mean_tau = (y[None, :] / s[None, :] ** 2 + mu_mean[:, None] / tau[:, None] ** 2) / t_prec
    theta_mean_tau = np.where(tau[:, None] > 0, theta_mean_tau, mu_mean[:, None])

    idx = rng.choice(tau.size, size=n_draws, p=w)
    if fixed_tau is None:
        half = np.gradient(tau)[idx] / 2
        tau_d = np.clip(tau[idx] + rng.uniform(-half, half), 1e-12, None)
    else:
        tau_d = tau[idx]
    # re-evaluate mu | tau at the jittered tau
    v_d = s[None, :] ** 2 + tau_d[:, None] ** 2
    prec_d = 1.0 / v_d
    mu_prec_d = prec_d.sum(axis=1) + p0
    mu_mean_d = ((prec_d * y).sum(axis=1) + p0 * prior.mu_loc) / mu_prec_d
    mu_d = rng.normal(mu_mean_d, np.sqrt(1.0 / mu_prec_d))
    if fixed_tau == 0:
        theta_d = np.repeat(mu_d[:, None], y.size, axis=1)
    else:
        tp = 1.0 / s[None, :] ** 2 + 1.0 / tau_d[:, None] ** 2
        tm = (y[None, :] / s[None, :] ** 2 + mu_d[:, None] / tau_d[:, None] ** 2) / tp
        theta_d = rng.normal(tm, np.sqrt(1.0 / tp))
    new = rng.normal(mu_d, tau_d)
    return PoolingPosterior(tau_grid=tau, tau_weights=w, mu_mean=mu_mean, mu_var=mu_var,
                            theta_mean_given_tau=theta_mean_tau, mu=mu_d, tau=tau_d, theta=theta_d, new=new)
