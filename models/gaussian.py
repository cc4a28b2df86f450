"""The quick mode's posterior: the same structure as the full model on Gaussian approximations of its curves.

Each (campaign, outcome) pair's conditional log-likelihood curve is replaced by the Gaussian with
the same (Firth-penalized) peak and curvature: an estimate ``y_p`` with standard error ``s_p``.
The structure is the full model's::

    placebo p of campaign c:  y_p ~ N(b_c, s_p^2 + residual_sd^2)
    target of campaign c:     y_t ~ N(b_c + x_c, s_t^2)
    b_c ~ N(bias_mean, bias_sd^2),  x_c ~ N(lift_mean (+ excess_mean), lift_sd^2 + residual_sd^2 (+ excess_sd^2))
    randomized test of campaign c:  y_c ~ N(lift_c, se_c^2)

so every campaign learns its own bias from its own placebos.  Given the spreads everything
else is jointly Gaussian: the means and each campaign's (b_c, x_c) are integrated exactly (the
Woodbury identity per campaign: its observations share b_c), and the spreads' marginal posterior is
computed on a grid (BDA3 section 5.4 in three dimensions, four when the target's excess bias is a
model term, :mod:`liftpool.models.evidence`).  Draws take the spreads from the grid
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

__all__ = ["gaussian_posterior", "SPREAD_GRID", "EXCESS_GRID"]

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


def _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, has_t, sr2, sl2, se2=0.0, tests=None):
    """Per campaign sums over its placebo observations, its target and its tests, for given spreads.

    ``sr2``, ``sl2`` and ``se2`` (the excess bias's variance) broadcast against a leading axis;
    returns a dict of arrays (..., C).  A tested campaign's target is taken given its test (the
    lift's normal update, :func:`liftpool.models.evidence.lift_given_tests`): its observation
    ``yt - k y_test`` has coefficient ``a = 1 - k`` on ``lift_mean``, and the test itself is an
    observation of ``lift_mean`` with variance ``lift_sd^2 + se_test^2``.
    """
    lead = np.broadcast_shapes(np.shape(sr2), np.shape(sl2), np.shape(se2))
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
    shape = lead + (C,)
    sl2_ = np.asarray(sl2, float)[..., None]
    has_x = np.zeros(C) if tests is None else tests.has
    ty = np.zeros(C) if tests is None else tests.y
    tse2 = np.ones(C) if tests is None else tests.se2
    k = has_x * sl2_ / (sl2_ + tse2)
    v_l = sl2_ * (1.0 - k)
    # target variance after integrating the lift (given its test), the excess bias and the residual
    w = st2 + v_l + sr2[..., None] + np.asarray(se2, float)[..., None]
    pi = np.where(has_t, 1.0 / w, 0.0)
    rho = has_x / (sl2_ + tse2)
    return {"A_pl": np.broadcast_to(A_pl, shape), "Sy_pl": np.broadcast_to(Sy_pl, shape),
            "Syy_pl": np.broadcast_to(Syy_pl, shape), "LD_pl": np.broadcast_to(LD_pl, shape),
            "pi": np.broadcast_to(pi, shape), "LDt": np.broadcast_to(np.where(has_t, np.log(w), 0.0), shape),
            "yt": np.broadcast_to(yt - k * ty, shape), "a": np.broadcast_to(1.0 - k, shape), "k": np.broadcast_to(k, shape),
            "rho": np.broadcast_to(rho, shape), "ty": ty,
            "LDx": np.broadcast_to(np.where(has_x > 0, np.log(sl2_ + tse2), 0.0), shape)}


def _marginal(t, sb2, prior_prec):
    """Log marginal likelihood (the three means integrated) and the means' posterior, per spread point.

    The means are ``(bias_mean, lift_mean, excess_mean)``.

    Returns
    -------
    logml : ndarray (...)
    Lam : ndarray (..., 3, 3)
        Posterior precision of the means.
    r : ndarray (..., 3)
        ``Lam @ mean``.
    inv : ndarray (..., 3, 3)
    """
    pi, yt, a, rho, ty = t["pi"], t["yt"], t["a"], t["rho"], t["ty"]
    sb2 = np.asarray(sb2)[..., None]
    A0 = t["A_pl"] + pi
    Sy = t["Sy_pl"] + pi * yt
    Syy = t["Syy_pl"] + pi * yt**2
    kap = sb2 / (1.0 + sb2 * A0)
    yVy = Syy - kap * Sy**2 + rho * ty**2
    g = pi * yt - kap * pi * Sy
    q = pi - kap * A0 * pi
    p2 = pi - kap * pi**2
    logdet = (t["LD_pl"] + t["LDt"] + np.log1p(sb2 * A0) + t["LDx"]).sum(-1)
    Q = yVy.sum(-1)
    r = np.stack([(Sy * (1.0 - kap * A0)).sum(-1), (a * g + rho * ty).sum(-1), g.sum(-1)], -1)
    m11, m12, m13 = (A0 - kap * A0**2).sum(-1), (a * q).sum(-1), q.sum(-1)
    m22, m23, m33 = (a**2 * p2 + rho).sum(-1), (a * p2).sum(-1), p2.sum(-1)
    M = np.stack([np.stack([m11, m12, m13], -1), np.stack([m12, m22, m23], -1), np.stack([m13, m23, m33], -1)], -2)
    Lam = M + np.diag(prior_prec)
    inv = np.linalg.inv(Lam)
    quad = np.einsum("...i,...ij,...j->...", r, inv, r)
    logml = -0.5 * logdet - 0.5 * Q + 0.5 * quad - 0.5 * np.linalg.slogdet(Lam)[1] + 0.5 * np.log(prior_prec).sum()
    return logml, Lam, r, inv


#: Grid points of the excess bias's spread (a fourth grid axis, only when the excess is a model term).
EXCESS_GRID = 12


def gaussian_posterior(y: np.ndarray, se: np.ndarray, informative: np.ndarray, pair_campaign: np.ndarray,
                       target_pair: np.ndarray, s: ModelSettings, n_draws: int,
                       rng: np.random.Generator, fixed_spreads: dict[str, float] | None = None,
                       tests=None) -> dict[str, np.ndarray]:
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
    tests : CampaignTests, optional
        Randomized tests (:mod:`liftpool.models.evidence`); with them (or ``excess_bias="on"``) the
        target's excess bias is a model term, its spread a fourth grid axis.

    Returns
    -------
    dict
        ``bias_mean, bias_sd, residual_sd, lift_mean, lift_sd`` (D,), ``bias, target_excess`` (D, C),
        ``excess_mean, excess_sd`` (D,) when the excess is a model term, and ``corrected`` /
        ``single`` flags.
    """
    from liftpool.models.evidence import excess_active

    C = target_pair.size
    is_t = np.zeros(y.size, dtype=bool)
    is_t[target_pair] = True
    pl = np.flatnonzero(~is_t & informative)
    corrected = bool((~is_t).any())
    single = C == 1
    excess = corrected and excess_active(s, tests)
    y_pl, v_pl, camp_pl = y[pl], se[pl] ** 2, pair_campaign[pl]
    has_t = informative[target_pair]
    yt = np.where(has_t, y[target_pair], 0.0)
    st2 = np.where(has_t, se[target_pair] ** 2, 1.0)
    n = SPREAD_GRID
    # the spreads' grids (a fixed spread is a single point of width 1)
    if single:
        gb, eb = _fixed(s.bias_mean_scale if corrected else 0.0)
        gl, el = _fixed(s.lift_mean_scale)
        prior_prec = [_PINNED, _PINNED]
    else:
        gb, eb = _spread_grid(s.bias_sd_scale, n) if corrected else _fixed(0.0)
        gl, el = _spread_grid(s.lift_sd_scale, n)
        prior_prec = [1.0 / s.bias_mean_scale**2 if corrected else _PINNED, 1.0 / s.lift_mean_scale**2]
    prior_prec = np.array(prior_prec + [1.0 / s.excess_mean_scale**2 if excess else _PINNED])
    gr, er = _spread_grid(s.residual_sd_scale, n) if corrected else _fixed(0.0)
    ge, ee = _spread_grid(s.excess_sd_scale, EXCESS_GRID) if excess else _fixed(0.0)
    fixed_spreads = fixed_spreads or {}
    if "bias_sd" in fixed_spreads and corrected and not single:
        gb, eb = _fixed(fixed_spreads["bias_sd"])
    if "residual_sd" in fixed_spreads and corrected:
        gr, er = _fixed(fixed_spreads["residual_sd"])
    if "lift_sd" in fixed_spreads and not single:
        gl, el = _fixed(fixed_spreads["lift_sd"])
    wb, wr, wl, we = np.diff(eb), np.diff(er), np.diff(el), np.diff(ee)

    def log_prior(sb, sr, sl, sx):
        lp = 0.0
        if not single and corrected:
            lp = lp + stats.halfnorm.logpdf(sb, scale=s.bias_sd_scale)
        if not single:
            lp = lp + stats.halfnorm.logpdf(sl, scale=s.lift_sd_scale)
        if corrected:
            lp = lp + stats.halfnorm.logpdf(sr, scale=s.residual_sd_scale)
        if excess:
            lp = lp + stats.halfnorm.logpdf(sx, scale=s.excess_sd_scale)
        return lp

    def terms_at(sr2, sl2, se2):
        return _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, has_t, sr2, sl2, se2, tests)

    # log posterior on the grid: loop over (excess_sd, bias_sd), vectorize over (residual_sd, lift_sd)
    SR, SL = np.meshgrid(gr, gl, indexing="ij")
    logp = np.empty((ge.size, gb.size) + SR.shape)
    for h, sx in enumerate(ge):
        terms = terms_at(gr[:, None] ** 2 + 0 * SL, SL**2, sx**2)
        for i, sb in enumerate(gb):
            lm, _, _, _ = _marginal(terms, sb**2, prior_prec)
            logp[h, i] = (lm + log_prior(sb, SR, SL, sx) + np.log(we[h]) + np.log(wb[i]) + np.log(wr)[:, None]
                          + np.log(wl)[None, :])
    w = np.exp(logp - logp.max()).ravel()
    w /= w.sum()
    pick = rng.choice(w.size, size=n_draws, p=w)
    ix, ib, ir, il = np.unravel_index(pick, logp.shape)

    def jitter(grid, edges, i):
        # a fixed spread stays put; a grid spread is drawn uniformly within its cell
        return grid[i] if grid.size == 1 else rng.uniform(edges[i], edges[i + 1])

    sb, sr, sl, sx = jitter(gb, eb, ib), jitter(gr, er, ir), jitter(gl, el, il), jitter(ge, ee, ix)
    # means | spreads, then each campaign's (b, x) | means, spreads
    out = {k: np.empty(n_draws) for k in ("bias_mean", "lift_mean", "excess_mean")}
    bias = np.empty((n_draws, C))
    target_x = np.empty((n_draws, C))
    for lo in range(0, n_draws, 500):
        sl_ = slice(lo, min(n_draws, lo + 500))
        t = terms_at(sr[sl_] ** 2, sl[sl_] ** 2, sx[sl_] ** 2)
        _, _, r, inv = _marginal(t, sb[sl_] ** 2, prior_prec)
        mean = np.einsum("dij,dj->di", inv, r)
        chol = np.linalg.cholesky(inv + 1e-300 * np.eye(3))
        mu = mean + np.einsum("dij,dj->di", chol, rng.standard_normal(mean.shape))
        mb, ml, me = mu[:, 0], mu[:, 1], mu[:, 2]
        if not corrected:
            mb = np.zeros_like(mb)
        if not excess:
            me = np.zeros_like(me)
        sb2 = (sb[sl_] ** 2)[:, None]
        pi, a, ytp = t["pi"], t["a"], t["yt"]
        # b_c | means: observations of b are the placebos and the target (given its test) with variance w
        with np.errstate(divide="ignore", invalid="ignore"):
            prec = t["A_pl"] + pi + np.where(sb2 > 0, 1.0 / sb2, np.inf)
            mean_b = (t["Sy_pl"] + pi * (ytp - a * ml[:, None] - me[:, None])
                      + np.where(sb2 > 0, mb[:, None] / sb2, 0.0)) / prec
        b = np.where(sb2 > 0, mean_b + rng.standard_normal(mean_b.shape) / np.sqrt(prec), mb[:, None])
        if not corrected:
            b = np.zeros_like(b)
        # x_c | b: prior N(lift centre given the test + excess_mean, v_l + residual_sd^2 + excess_sd^2)
        k = t["k"]
        sl2 = (sl[sl_] ** 2)[:, None]
        tau2 = sl2 * (1.0 - k) + (sr[sl_] ** 2)[:, None] + (sx[sl_] ** 2)[:, None]
        cx = a * ml[:, None] + k * t["ty"] + me[:, None]
        pt_ = np.where(has_t, 1.0 / st2, 0.0)
        px = pt_ + 1.0 / tau2
        mx = (pt_ * (yt - b) + cx / tau2) / px
        target_x[sl_] = mx + rng.standard_normal(mx.shape) / np.sqrt(px)
        bias[sl_] = b
        out["bias_mean"][sl_] = mb
        out["lift_mean"][sl_] = ml
        out["excess_mean"][sl_] = me
    out.update(bias_sd=sb, residual_sd=sr, lift_sd=sl, bias=bias, target_excess=target_x)
    if excess:
        out["excess_sd"] = sx
    else:
        del out["excess_mean"]
    out["corrected"] = corrected
    out["single"] = single
    return out
