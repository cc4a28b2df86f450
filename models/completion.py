"""From the sampled (or quick-mode) core of the posterior to every reported quantity, draw by draw.

Both modes produce the same core: the spreads and means, each campaign's bias ``b_c`` and its
target excess ``x_c`` (the target's seen/unseen log odds ratio beyond the bias: lift plus the
target's own residual).  This module completes each draw, so both modes report the same
quantities with the same meaning:

* the lift (log odds) from its exact conditional normal given ``x_c`` (a data-free split of
  ``x_c`` into lift and residual, see docs/model.md);
* each placebo's effect ``b_c + r_p`` with ``r_p`` from the Gaussian approximation of its
  conditional given ``b_c`` and ``residual_sd`` (for the placebo table only);
* rates: each target cell's seen-arm log odds ``gamma`` from its conditional given the sampled
  effect and the cell's counts (a Binomial posterior with a weak prior on the cell baseline,
  by a Laplace approximation whose mode is refined by one Newton step at every draw), then the
  relative lift among seen users, the lift before bias correction, incremental and
  counterfactual conversions.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from scipy.special import expit, logit

__all__ = ["complete_draws", "split_lift", "lift_spread", "BASELINE_PRIOR_SD", "target_cells"]

#: Prior sd (log odds) of a cell's baseline around its pair's pooled unseen rate.
BASELINE_PRIOR_SD = 2.0


def lift_spread(lift_sd, group_sd, campaign_group, sqrt=np.sqrt):
    """Each campaign's lift spread around its centre: ``lift_sd``, and for a campaign without a group
    (``campaign_group < 0``) also its unknown group effect, ``sqrt(lift_sd^2 + group_sd^2)``.
    Broadcasts: scalars or (D,) draws give (C,) or (D, C)."""
    ungrouped = (np.asarray(campaign_group) < 0).astype(float)
    ls = lift_sd[..., None] if getattr(lift_sd, "ndim", 0) else lift_sd
    gs = group_sd[..., None] if getattr(group_sd, "ndim", 0) else group_sd
    return sqrt(ls**2 + ungrouped * gs**2)


def split_lift(x, centre, lift_sd, residual_sd, z):
    """The lift given the target excess ``x = lift + residual`` (exact conditional normal).

    ``lift ~ N(centre, lift_sd)`` and ``residual ~ N(0, residual_sd)`` a priori; the data see only
    their sum, so ``lift | x ~ N(centre + k (x - centre), k residual_sd^2)``, ``k = lift_sd^2 /
    (lift_sd^2 + residual_sd^2)``.  ``z`` is a standard normal draw.
    """
    tot = lift_sd**2 + residual_sd**2
    k = np.where(tot > 0, lift_sd**2 / np.where(tot > 0, tot, 1.0), 1.0)
    return centre + k * (x - centre) + np.sqrt(k) * residual_sd * z


def target_cells(design, cells) -> dict[str, np.ndarray]:
    """The target strata of every campaign with the counts the rate completion needs."""
    tp = design.target_pair()
    is_t = np.isin(cells.pair, tp)
    idx = np.flatnonzero(is_t & (cells.n1 > 0))
    pair_to_camp = np.full(len(design.pair_campaign), -1)
    pair_to_camp[tp] = np.arange(tp.size)
    camp = pair_to_camp[cells.pair[idx]]
    # prior centre of each cell's baseline: its pair's pooled unseen rate (a shift, not information)
    P = len(design.pair_campaign)
    x0p = np.bincount(cells.pair, weights=cells.x0, minlength=P)
    n0p = np.bincount(cells.pair, weights=cells.n0, minlength=P)
    mu0 = logit((x0p + 0.5) / (n0p + 1.0))[cells.pair[idx]]
    return {"campaign": camp, "n1": cells.n1[idx].astype(float), "n0": cells.n0[idx].astype(float),
            "x1": cells.x1[idx].astype(float), "x0": cells.x0[idx].astype(float), "mu0": mu0}


def _gamma_mode(t, psi, gamma, steps):
    """Newton steps toward the mode of the seen-arm log odds given ``psi`` (broadcast)."""
    v_prior = BASELINE_PRIOR_SD**2
    for _ in range(steps):
        p1, p0 = expit(gamma), expit(gamma - psi)
        grad = t["x1"] - t["n1"] * p1 + t["x0"] - t["n0"] * p0 - (gamma - psi - t["mu0"]) / v_prior
        curv = t["n1"] * p1 * (1 - p1) + t["n0"] * p0 * (1 - p0) + 1.0 / v_prior
        gamma = gamma + grad / curv
    return gamma, curv


@numba.njit(cache=True, parallel=True)
def _rate_sums(psi, lift, z, k, C, g0, slope, psi0, n1, n0, x1, x0, mu0, iv):
    """Per draw (row) and campaign: expected seen conversions as observed, without the ads, and at the
    unseen rate; each cell's seen log odds from one Newton step of :func:`_gamma_mode` from its linear
    prediction, plus ``z`` over the root curvature (the Laplace draw)."""
    D = psi.shape[0]
    seen, without, unseen = np.zeros((D, C)), np.zeros((D, C)), np.zeros((D, C))
    for d in numba.prange(D):
        for c in range(k.size):
            ps, ls = psi[d, k[c]], lift[d, k[c]]
            gam = g0[c] + slope[c] * (ps - psi0[c])
            p1 = 1.0 / (1.0 + math.exp(-gam))
            p0 = 1.0 / (1.0 + math.exp(-(gam - ps)))
            grad = x1[c] - n1[c] * p1 + x0[c] - n0[c] * p0 - (gam - ps - mu0[c]) * iv
            curv = n1[c] * p1 * (1 - p1) + n0[c] * p0 * (1 - p0) + iv
            gam = gam + grad / curv + z[d, c] / math.sqrt(curv)
            seen[d, k[c]] += n1[c] / (1.0 + math.exp(-gam))
            without[d, k[c]] += n1[c] / (1.0 + math.exp(-(gam - ls)))
            unseen[d, k[c]] += n1[c] / (1.0 + math.exp(-(gam - ps)))
    return seen, without, unseen


def rate_quantities(t, C, psi, lift, rng, chunk=256):
    """Relative lift, uncorrected lift, incremental and counterfactual conversions among seen users.

    Parameters
    ----------
    t : dict
        :func:`target_cells`.
    C : int
    psi, lift : ndarray, shape (D, C)
        The target's total seen/unseen log odds ratio and the lift (log odds), per draw.
    """
    D = psi.shape[0]
    k = t["campaign"]
    # start: the mode at each campaign's mean effect, and its slope in psi (implicit derivative)
    psi0 = psi.mean(axis=0)[k]
    g0 = logit((t["x1"] + 0.5) / (t["n1"] + 1.0))
    g0, _ = _gamma_mode(t, psi0, g0, 30)
    p1, p0 = expit(g0), expit(g0 - psi0)
    a0 = t["n0"] * p0 * (1 - p0) + 1.0 / BASELINE_PRIOR_SD**2
    slope = a0 / (t["n1"] * p1 * (1 - p1) + a0)
    out = {q: np.empty((D, C)) for q in ("seen", "without", "unseen")}
    cell = {q: np.ascontiguousarray(v, dtype=float) for q, v in (("g0", g0), ("slope", slope), ("psi0", psi0))}
    cell.update({q: np.ascontiguousarray(t[q], dtype=float) for q in ("n1", "n0", "x1", "x0", "mu0")})
    kk = np.ascontiguousarray(k, dtype=np.int64)
    for lo in range(0, D, chunk):
        s = slice(lo, min(D, lo + chunk))
        z = rng.standard_normal((s.stop - lo, k.size))
        out["seen"][s], out["without"][s], out["unseen"][s] = _rate_sums(
            np.ascontiguousarray(psi[s], dtype=float), np.ascontiguousarray(lift[s], dtype=float), z, kk, C,
            cell["g0"], cell["slope"], cell["psi0"], cell["n1"], cell["n0"], cell["x1"], cell["x0"], cell["mu0"],
            1.0 / BASELINE_PRIOR_SD**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return {"lift": out["seen"] / out["without"] - 1.0, "lift_uncorrected": out["seen"] / out["unseen"] - 1.0,
                "incremental_conversions": out["seen"] - out["without"],
                "counterfactual_conversions": out["without"]}


def complete_draws(design, cells, curves, core: dict, rng: np.random.Generator, tests=None) -> dict[str, np.ndarray]:
    """Every reported quantity from the core draws (each array with draws on the first axis).

    Parameters
    ----------
    design : Design
    cells : CellTable
    curves : CurveSet
    core : dict
        ``target_excess, bias`` (D, C); ``lift_mean, lift_sd, residual_sd`` (D,) where sampled;
        optional ``group_effect`` (D, G) and ``outcome_bias`` (D, O); flags ``corrected``, ``single``
        and the fixed prior scales ``lift_mean_scale`` (used for a single campaign); ``excess_mean``,
        ``excess_sd`` (D,) when the target's excess bias is a model term.
    tests : CampaignTests, optional
        Randomized tests (:mod:`liftpool.models.evidence`): a tested campaign's lift prior is its
        normal update given them.

    Returns
    -------
    dict
        ``lift_logodds, bias_target, lift, lift_uncorrected, incremental_conversions,
        counterfactual_conversions`` (D, C), ``effect`` (D, P), and ``excess_bias`` (D, C) when
        the excess is a model term.
    """
    from liftpool.models.evidence import campaign_tests, lift_given_tests

    x = core["target_excess"]
    D, C = x.shape
    corrected, single = core["corrected"], core["single"]
    if single:
        centre = np.zeros((D, C))
        lift_sd = np.full(D, core["lift_mean_scale"])
    else:
        centre = np.repeat(core["lift_mean"][:, None], C, axis=1)
        lift_sd = core["lift_sd"]
        if "group_sd" in core:  # an ungrouped campaign's unknown group effect widens its lift's prior
            lift_sd = lift_spread(lift_sd, core["group_sd"], design.campaign_group)
        if "group_effect" in core:
            g = design.campaign_group
            centre = centre + np.where(g >= 0, core["group_effect"][:, np.maximum(g, 0)], 0.0)
    excess = None
    if corrected:
        sr = core["residual_sd"][:, None]
        tests = tests if tests is not None else campaign_tests(list(design.campaigns), None)
        m_l, v_l = lift_given_tests(centre, lift_sd if lift_sd.ndim == 2 else lift_sd[:, None], tests)
        # x = lift + u, u = excess bias + the target's residual ~ N(excess_mean, excess_sd^2 + residual_sd^2)
        mu_e = core["excess_mean"][:, None] if "excess_mean" in core else np.zeros((D, 1))
        sde = core["excess_sd"][:, None] if "excess_sd" in core else np.zeros((D, 1))
        lift = split_lift(x - mu_e, m_l, np.sqrt(v_l), np.sqrt(sr**2 + sde**2), rng.standard_normal((D, C)))
        if "excess_mean" in core:  # the excess bias given u: the same exact split of u into its two parts
            u = x - lift
            excess = split_lift(u, mu_e, sde, sr, rng.standard_normal((D, C)))
        eta = core["bias"][:, design.pair_campaign]
        if "outcome_bias" in core:
            eta = eta + core["outcome_bias"][:, design.pair_outcome]
    else:
        lift = x
        eta = np.zeros((D, len(design.pair_campaign)))
    tp = design.target_pair()
    psi_t = eta[:, tp] + x
    out = {"lift_logodds": lift, "bias_target": psi_t - lift}
    if excess is not None:
        out["excess_bias"] = excess
    # placebo effects: the Gaussian approximation of r_p | b_c, residual_sd, data
    effect = np.empty_like(eta)
    effect[:, tp] = psi_t
    pl = np.flatnonzero(~np.isin(np.arange(eta.shape[1]), tp))
    if pl.size and corrected:
        info = np.where(curves.informative[pl], curves.information[pl], 0.0)
        sr2 = (core["residual_sd"] ** 2)[:, None]
        prec = info + 1.0 / sr2
        mean = info * (curves.mode[pl] - eta[:, pl]) / prec
        effect[:, pl] = eta[:, pl] + mean + rng.standard_normal(mean.shape) / np.sqrt(prec)
    elif pl.size:
        effect[:, pl] = np.nan
    out["effect"] = effect
    out.update(rate_quantities(target_cells(design, cells), C, psi_t, lift, rng))
    return out
