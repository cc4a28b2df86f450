"""The quick mode's posterior: the same structure as the full model on Gaussian approximations of its curves.

Each (campaign, outcome) pair's conditional log-likelihood curve is replaced by the Gaussian with
the same (Firth-penalized) peak and curvature: an estimate ``y_p`` with standard error ``s_p``.
The structure is the full model's::

    placebo p of campaign c:  y_p ~ N(b_c, s_p^2 + residual_sd^2)
    target of campaign c:     y_t ~ N(b_c + x_c, s_t^2)
    b_c ~ N(bias_mean, bias_sd^2),  x_c ~ N(lift_mean, lift_sd^2 + residual_sd^2)

so every campaign learns its own bias from its own placebos.  Given the three spreads everything
else is jointly Gaussian: the means and each campaign's (b_c, x_c) are integrated exactly (the
Woodbury identity per campaign: its observations share b_c), and the spreads' marginal posterior is
computed on a grid (BDA3 section 5.4 in three dimensions).  Draws take the spreads from the grid
(jittered within their cell), then the means, then each campaign's (b_c, x_c) from their exact
conditionals: one joint posterior, no sampler.

A single campaign has no population: ``bias_mean`` and ``lift_mean`` are fixed at 0 and the
spreads at the prior scales of the means (the full model's priors).  With no placebo anywhere the
bias is 0 and ``x_c`` is the lift.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from liftpool.models.settings import ModelSettings

__all__ = ["gaussian_posterior", "SPREAD_GRID"]

#: Grid points per spread.
SPREAD_GRID = 28
#: Prior precision that pins a fixed mean at zero.
_PINNED = 1e12


def _spread_grid(scale: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Points and cell edges over (0, 5 scale] for a half-normal(scale) spread, denser near zero."""
    pts = 5.0 * scale * ((np.arange(n) + 0.5) / n) ** 2
    edges = 5.0 * scale * (np.arange(n + 1) / n) ** 2
    return pts, edges


def _fixed(value: float) -> tuple[np.ndarray, np.ndarray]:
    """A spread fixed at ``value``: one point in a cell of width 1 (its weight is then 1)."""
    return np.array([value]), np.array([value - 0.5, value + 0.5])


def _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, has_t, sr2, sl2):
    """Per campaign sums over its placebo observations and its target, for given spreads (broadcast).

    ``sr2`` and ``sl2`` broadcast against a leading axis; returns arrays (..., C).
    """
    lead = np.broadcast_shapes(np.shape(sr2), np.shape(sl2))
    sr2 = np.asarray(sr2, float)
    v = v_pl + sr2[..., None] if sr2.ndim else v_pl + sr2  # (..., Ppl)
    p = 1.0 / v

    def per_campaign(x):
        x2 = x.reshape(-1, x.shape[-1])
        out = np.zeros((x2.shape[0], C))
        for i in range(x2.shape[0]):
            out[i] = np.bincount(camp_pl, weights=x2[i], minlength=C)
        return out.reshape(x.shape[:-1] + (C,))

    A_pl = per_campaign(p) if y_pl.size else np.zeros(np.shape(sr2) + (C,))
    Sy_pl = per_campaign(p * y_pl) if y_pl.size else np.zeros_like(A_pl)
    Syy_pl = per_campaign(p * y_pl**2) if y_pl.size else np.zeros_like(A_pl)
    LD_pl = per_campaign(np.log(v)) if y_pl.size else np.zeros_like(A_pl)
    w = st2 + np.asarray(sl2)[..., None] + sr2[..., None]  # target variance after integrating x
    pi = np.where(has_t, 1.0 / w, 0.0)
    shape = lead + (C,)
    return (np.broadcast_to(A_pl, shape), np.broadcast_to(Sy_pl, shape), np.broadcast_to(Syy_pl, shape),
            np.broadcast_to(LD_pl, shape), pi, np.where(has_t, np.log(w), 0.0))


def _marginal(terms, yt, sb2, prior_prec):
    """Log marginal likelihood (means integrated) and the means' posterior, per spread point.

    Returns
    -------
    logml : ndarray (...)
    Lam : ndarray (..., 2, 2)
        Posterior precision of (bias_mean, lift_mean).
    r : ndarray (..., 2)
        ``Lam @ mean``.
    """
    A_pl, Sy_pl, Syy_pl, LD_pl, pi, LDt = terms
    sb2 = np.asarray(sb2)[..., None]
    A0 = A_pl + pi
    Sy = Sy_pl + pi * yt
    Syy = Syy_pl + pi * yt**2
    kap = sb2 / (1.0 + sb2 * A0)
    yVy = Syy - kap * Sy**2
    h1y = Sy * (1.0 - kap * A0)
    h2y = pi * yt - kap * pi * Sy
    h11 = A0 - kap * A0**2
    h12 = pi - kap * A0 * pi
    h22 = pi - kap * pi**2
    logdet = (LD_pl + LDt + np.log1p(sb2 * A0)).sum(-1)
    Q = yVy.sum(-1)
    r = np.stack([h1y.sum(-1), h2y.sum(-1)], -1)
    M = np.stack([np.stack([h11.sum(-1), h12.sum(-1)], -1), np.stack([h12.sum(-1), h22.sum(-1)], -1)], -2)
    Lam = M + np.diag(prior_prec)
    det = Lam[..., 0, 0] * Lam[..., 1, 1] - Lam[..., 0, 1] ** 2
    inv = np.stack([np.stack([Lam[..., 1, 1], -Lam[..., 0, 1]], -1),
                    np.stack([-Lam[..., 0, 1], Lam[..., 0, 0]], -1)], -2) / det[..., None, None]
    quad = np.einsum("...i,...ij,...j->...", r, inv, r)
    logml = -0.5 * logdet - 0.5 * Q + 0.5 * quad - 0.5 * np.log(det) + 0.5 * np.log(prior_prec).sum()
    return logml, Lam, r, inv


def gaussian_posterior(y: np.ndarray, se: np.ndarray, informative: np.ndarray, pair_campaign: np.ndarray,
                       target_pair: np.ndarray, s: ModelSettings, n_draws: int,
                       rng: np.random.Generator, fixed_spreads: dict[str, float] | None = None
                       ) -> dict[str, np.ndarray]:
    """Joint draws of the model's spreads, means, campaign biases and target excesses.

    Parameters
    ----------
    y, se : ndarray, shape (P,)
        Each pair's Gaussian approximation (peak and 1 / sqrt(curvature)).
    informative : ndarray of bool, shape (P,)
        Pairs with a curve (the others carry no information).
    pair_campaign : ndarray of int, shape (P,)
    target_pair : ndarray of int, shape (C,)
    s : ModelSettings
    n_draws : int
    rng : numpy Generator
    fixed_spreads : dict, optional
        ``bias_sd``, ``residual_sd`` or ``lift_sd`` held at given values instead of integrated
        (an oracle for known-truth checks: the same model with the true spreads).

    Returns
    -------
    dict
        ``bias_mean, bias_sd, residual_sd, lift_mean, lift_sd`` (D,), ``bias, target_excess`` (D, C),
        and ``corrected`` / ``single`` flags.
    """
    C = target_pair.size
    is_t = np.zeros(y.size, dtype=bool)
    is_t[target_pair] = True
    pl = np.flatnonzero(~is_t & informative)
    corrected = bool((~is_t).any())
    single = C == 1
    y_pl, v_pl, camp_pl = y[pl], se[pl] ** 2, pair_campaign[pl]
    has_t = informative[target_pair]
    yt = np.where(has_t, y[target_pair], 0.0)
    st2 = np.where(has_t, se[target_pair] ** 2, 1.0)
    n = SPREAD_GRID
    # the spreads' grids (a fixed spread is a single point of width 1)
    if single:
        gb, eb = _fixed(s.bias_mean_scale if corrected else 0.0)
        gl, el = _fixed(s.lift_mean_scale)
        prior_prec = np.array([_PINNED, _PINNED])
    else:
        gb, eb = _spread_grid(s.bias_sd_scale, n) if corrected else _fixed(0.0)
        gl, el = _spread_grid(s.lift_sd_scale, n)
        prior_prec = np.array([1.0 / s.bias_mean_scale**2 if corrected else _PINNED, 1.0 / s.lift_mean_scale**2])
    gr, er = _spread_grid(s.residual_sd_scale, n) if corrected else _fixed(0.0)
    fixed_spreads = fixed_spreads or {}
    if "bias_sd" in fixed_spreads and corrected and not single:
        gb, eb = _fixed(fixed_spreads["bias_sd"])
    if "residual_sd" in fixed_spreads and corrected:
        gr, er = _fixed(fixed_spreads["residual_sd"])
    if "lift_sd" in fixed_spreads and not single:
        gl, el = _fixed(fixed_spreads["lift_sd"])
    wb, wr, wl = np.diff(eb), np.diff(er), np.diff(el)

    def log_prior(sb, sr, sl):
        lp = 0.0
        if not single and corrected:
            lp = lp + stats.halfnorm.logpdf(sb, scale=s.bias_sd_scale)
        if not single:
            lp = lp + stats.halfnorm.logpdf(sl, scale=s.lift_sd_scale)
        if corrected:
            lp = lp + stats.halfnorm.logpdf(sr, scale=s.residual_sd_scale)
        return lp

    # log posterior on the grid: loop over bias_sd, vectorize over (residual_sd, lift_sd)
    SR, SL = np.meshgrid(gr, gl, indexing="ij")
    terms = _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, has_t, gr[:, None] ** 2 + 0 * SL, SL**2)
    logp = np.empty((gb.size,) + SR.shape)
    for i, sb in enumerate(gb):
        lm, _, _, _ = _marginal(terms, yt, sb**2, prior_prec)
        logp[i] = lm + log_prior(sb, SR, SL) + np.log(wb[i]) + np.log(wr)[:, None] + np.log(wl)[None, :]
    w = np.exp(logp - logp.max()).ravel()
    w /= w.sum()
    pick = rng.choice(w.size, size=n_draws, p=w)
    ib, ir, il = np.unravel_index(pick, logp.shape)

    def jitter(grid, edges, i):
        # a fixed spread stays put; a grid spread is drawn uniformly within its cell
        return grid[i] if grid.size == 1 else rng.uniform(edges[i], edges[i + 1])

    sb, sr, sl = jitter(gb, eb, ib), jitter(gr, er, ir), jitter(gl, el, il)
    # means | spreads, then each campaign's (b, x) | means, spreads
    out = {k: np.empty(n_draws) for k in ("bias_mean", "lift_mean")}
    bias = np.empty((n_draws, C))
    excess = np.empty((n_draws, C))
    for lo in range(0, n_draws, 500):
        sl_ = slice(lo, min(n_draws, lo + 500))
        t = _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, has_t, sr[sl_] ** 2, sl[sl_] ** 2)
        _, _, r, inv = _marginal(t, yt, sb[sl_] ** 2, prior_prec)
        mean = np.einsum("dij,dj->di", inv, r)
        chol = np.linalg.cholesky(inv + 1e-300 * np.eye(2))
        mu = mean + np.einsum("dij,dj->di", chol, rng.standard_normal(mean.shape))
        mb, ml = mu[:, 0], mu[:, 1]
        if not corrected:
            mb = np.zeros_like(mb)
        A_pl, Sy_pl, _, _, pi, _ = t
        sb2 = (sb[sl_] ** 2)[:, None]
        # b_c | mu: observations of b are the placebos and (y_t - lift_mean) with variance w
        with np.errstate(divide="ignore", invalid="ignore"):
            prec = A_pl + pi + np.where(sb2 > 0, 1.0 / sb2, np.inf)
            mean_b = (Sy_pl + pi * (yt - ml[:, None]) + np.where(sb2 > 0, mb[:, None] / sb2, 0.0)) / prec
        b = np.where(sb2 > 0, mean_b + rng.standard_normal(mean_b.shape) / np.sqrt(prec), mb[:, None])
        if not corrected:
            b = np.zeros_like(b)
        tau2 = (sl[sl_] ** 2 + sr[sl_] ** 2)[:, None]
        pt_ = np.where(has_t, 1.0 / st2, 0.0)
        px = pt_ + 1.0 / tau2
        mx = (pt_ * (yt - b) + ml[:, None] / tau2) / px
        excess[sl_] = mx + rng.standard_normal(mx.shape) / np.sqrt(px)
        bias[sl_] = b
        out["bias_mean"][sl_] = mb
        out["lift_mean"][sl_] = ml
    out.update(bias_sd=sb, residual_sd=sr, lift_sd=sl, bias=bias, target_excess=excess)
    out["corrected"] = corrected
    out["single"] = single
    return out
