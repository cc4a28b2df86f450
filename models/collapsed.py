"""The full model with every campaign-level effect integrated out of the sampler.

The model is the conditional-likelihood model of docs/model.md::

    pair p of campaign c:   psi_p = b_c + o_p + r_p,   r_p ~ N(0, residual_sd)     (placebo)
                            psi_t = b_c + o_t + x_c,   x_c ~ N(centre_c, tau)       (target)
    b_c ~ N(bias_mean, bias_sd),  tau^2 = lift_sd^2 + residual_sd^2,  centre_c = lift_mean (+ group)

with ``o`` the outcome biases (0 unless asked for).  Given the population-level parameters the
campaigns are independent, and each campaign's likelihood is a nested one-dimensional integral::

    L_c = log int N(b | bias_mean, bias_sd) prod_p M_p(b + offset_p; sd_p) db
    M_p(eta; sd) = int exp(curve_p(eta + r)) N(r | 0, sd) dr

(``offset = o_p, sd = residual_sd`` for a placebo; ``offset = o_t + centre_c, sd = tau`` for the
target, since its excess ``x_c`` enters like a residual around ``centre_c``).  Both integrals are
computed by adaptive Gauss-Hermite quadrature: each is centred and scaled by Newton steps on its own
integrand (the curves' analytic slope and curvature), so it is exact for Gaussian curves and
accurate to about 5e-5 on sparse ones at wide spreads (tests/test_collapsed.py, against dense trapezoid sums).

The sampler then moves in the population-level parameters only (5 at most without groups or
outcome biases, however many campaigns), a space with no funnel: there is no campaign-level
parameter whose scale a spread sets.  Each kept draw is then completed exactly: ``b_c`` from its
conditional density (computed on the outer quadrature's nodes and interpolated), then ``x_c``
given ``b_c`` from its conditional on a fine grid.  Centring is kept out of the gradient (the
centre and scale of each quadrature are constants to the sampler's gradient): the leapfrog
integrator is reversible and volume-preserving for any position-dependent force, so the chain
stays exact for the computed density, and at the quadrature's accuracy the force is its gradient.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np
import pymc as pm
import pytensor.tensor as pt
from pymc.distributions.dist_math import normal_lcdf
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op
from scipy import special

from liftpool.models.completion import lift_spread
from liftpool.models.conditional import CurveSet
from liftpool.models.evidence import (
    CampaignTests,
    campaign_tests,
    evidence_loglik,
    excess_active,
    lift_given_tests,
    normal_update,
)
from liftpool.models.settings import ModelSettings

__all__ = ["build_collapsed_model", "population_lift", "CampaignLoglik", "CampaignTerms", "campaign_terms", "campaign_draws", "OUTER_NODES",
           "INNER_NODES", "POPULATION_VARS"]

#: Gauss-Hermite nodes of each campaign's bias integral.
OUTER_NODES = 7
#: Gauss-Hermite nodes of each pair's residual (or target excess) integral.
INNER_NODES = 5
#: Newton steps that centre an inner integral; and the outer one.
INNER_STEPS = 3
OUTER_STEPS = 3
#: ... and the extra outer steps of a truncated bias (its integrand in v is skewed near the bound).
TRUNC_EXTRA_STEPS = 2
#: The population-level variables the collapsed sampler moves in (when present).
POPULATION_VARS = ("bias_mean", "bias_sd", "residual_sd", "lift_mean", "lift_sd", "group_sd", "group_effect",
                   "outcome_bias_sd", "outcome_bias", "excess_mean", "excess_sd")
LOG_SQRT_2PI = 0.5 * np.log(2 * np.pi)
#: Grid of the completion draws (points over the outer nodes' span; points over +-GRID_REACH sd for x).
B_GRID = 97
X_GRID = 49
GRID_REACH = 6.0
#: Draws completed at a time (bounds the completion's memory: a block's grid is COMPLETION_CHUNK x C x B_GRID).
COMPLETION_CHUNK = 256


@dataclass(frozen=True)
class CampaignTerms:
    """Which curves enter each campaign's integral (informative pairs only), sorted by campaign.

    Attributes
    ----------
    pair, campaign, outcome : ndarray of int, shape (I,)
    is_target : ndarray of bool, shape (I,)
    start : ndarray of int, shape (C + 1,)
        Terms of campaign ``c`` are ``start[c]:start[c + 1]``.
    n_campaigns : int
    corrected : bool
    single : bool
    """

    pair: np.ndarray
    campaign: np.ndarray
    outcome: np.ndarray
    is_target: np.ndarray
    start: np.ndarray
    n_campaigns: int
    corrected: bool
    single: bool


def campaign_terms(design, curves: CurveSet) -> CampaignTerms:
    """The informative pairs of every campaign, targets and placebos, grouped by campaign."""
    keep = np.flatnonzero(curves.informative)
    keep = keep[np.argsort(design.pair_campaign[keep], kind="stable")]
    camp = design.pair_campaign[keep]
    start = np.searchsorted(camp, np.arange(design.n_campaigns + 1))
    return CampaignTerms(pair=keep, campaign=camp, outcome=design.pair_outcome[keep],
                         is_target=design.pair_is_target[keep], start=start.astype(np.int64),
                         n_campaigns=design.n_campaigns, corrected=not design.flags.no_placebo_anywhere,
                         single=design.n_campaigns == 1)


def _tables(curves: CurveSet) -> tuple:
    """The curve tables in the order the compiled kernels take them."""
    f64 = lambda v: np.ascontiguousarray(v, dtype=np.float64)  # noqa: E731
    return (f64(curves.centre), f64(curves.scale), f64(curves.t_lo), f64(curves.dt), f64(curves.f),
            f64(curves.g * curves.dt[:, None]), f64(curves.psi_lo), f64(curves.psi_hi), f64(curves.end_f),
            f64(curves.end_d1), f64(curves.end_d2), f64(curves.mode), f64(curves.information))


@numba.njit(cache=True, inline="always")
def _spline(psi, p, tb):
    """Value, slope and curvature of pair ``p``'s interpolant at ``psi`` (:meth:`CurveSet.evaluate`).

    The tables are indexed in place (unpacking the tuple costs a reference count per array per call,
    three times the arithmetic).
    """
    F, Gd, dt = tb[4], tb[5], tb[3][p]
    G = F.shape[1]
    a = tb[1][p]
    z = (psi - tb[0][p]) / a
    u = (np.arcsinh(z) - tb[2][p]) / dt
    if u < 0.0 or u > G - 1:
        side = 0 if u < 0.0 else 1
        e = psi - (tb[6][p] if side == 0 else tb[7][p])
        f0, d1, d2 = tb[8][p, side], tb[9][p, side], tb[10][p, side]
        return f0 + d1 * e + 0.5 * d2 * e * e, d1 + d2 * e, d2
    j = min(int(np.floor(u)), G - 2)
    s = min(max(u - j, 0.0), 1.0)
    f0, f1, g0, g1 = F[p, j], F[p, j + 1], Gd[p, j], Gd[p, j + 1]
    s2 = s * s
    s3 = s2 * s
    v = (2 * s3 - 3 * s2 + 1) * f0 + (s3 - 2 * s2 + s) * g0 + (-2 * s3 + 3 * s2) * f1 + (s3 - s2) * g1
    dv = (6 * s2 - 6 * s) * f0 + (3 * s2 - 4 * s + 1) * g0 + (-6 * s2 + 6 * s) * f1 + (3 * s2 - 2 * s) * g1
    d2v = (12 * s - 6) * f0 + (6 * s - 4) * g0 + (-12 * s + 6) * f1 + (6 * s - 2) * g1
    q = 1.0 + z * z
    ds = 1.0 / (a * np.sqrt(q) * dt)
    return v, dv * ds, d2v * ds * ds - dv * z / (a * a * q * np.sqrt(q) * dt)


@numba.njit(cache=True, inline="always")
def _inner_peak(eta, sd, p, r, steps, tb):
    """Newton steps on curve(eta + r) - r^2 / (2 sd^2): the peak, the curve's curvature and the precision."""
    iv = 1.0 / (sd * sd)
    h = tb[12][p]
    prec = h + iv
    for _ in range(steps):
        _, g, h2 = _spline(eta + r, p, tb)
        h = max(-h2, 0.0)
        prec = h + iv
        step = (g - r * iv) / prec
        r += min(max(step, -3.0 * sd), 3.0 * sd)
    return r, h, prec


@numba.njit(cache=True, inline="always")
def _logsumexp(v, n):
    """log sum exp of the first ``n`` entries (loops: no temporary arrays in the kernels)."""
    mx = v[0]
    for j in range(1, n):
        mx = max(mx, v[j])
    acc = 0.0
    for j in range(n):
        acc += np.exp(v[j] - mx)
    return mx + np.log(acc)


@numba.njit(cache=True, inline="always")
def _half_line(v):
    """``g(v) = v Phi(v) + phi(v)`` (the integral of the normal CDF), ``g' = Phi`` and ``g'' = phi``.

    The map from the outer variable to a nonnegative bias (``b = kappa g(v)``): linear far above 0,
    and with a Gaussian tail (``g' = Phi``) towards 0, so the integrand in ``v`` stays close to a
    Gaussian both where the data put the bias far from 0 and where they press it against 0.
    """
    v = max(v, -30.0)
    cdf = 0.5 * math.erfc(-v / np.sqrt(2.0))
    pdf = np.exp(-0.5 * v * v) / np.sqrt(2.0 * np.pi)
    return v * cdf + pdf, cdf, pdf


@numba.njit(cache=True)
def _campaigns(mu_b, sd_b, off, sd, pairs, start, outer, tb, xo, lwo, xi, lwi, want_grad, trunc=False):
    """Every campaign's integrated log-likelihood, its gradient, and the outer nodes' integrands.

    ``outer`` False: no bias integral (no placebo anywhere), each campaign's terms at b = 0.
    ``trunc`` True: the bias is truncated at 0 (``bias_sign="nonnegative"``); the outer integral
    runs over ``v`` with ``b = kappa g(v)`` (:func:`_half_line`; its Jacobian in the integrand,
    ``kappa`` the Gaussian guess's sd), and ``m, half`` are the centre and half-width in ``v``.
    The prior's truncation constant ``-log Phi(mu_b / sd_b)`` is left to the caller.
    Returns ``loglik (C,), d_mu, d_sdb (C,), d_off, d_sd (I,), m, half, kappa (C,), f (C, K)``.
    """
    C = start.size - 1
    n_terms = pairs.size
    K, J = xo.size, xi.size
    mode, info = tb[11], tb[12]
    loglik = np.zeros(C)
    d_mu, d_sdb = np.zeros(C), np.zeros(C)
    d_off, d_sd = np.zeros(n_terms), np.zeros(n_terms)
    m_out, half_out = np.zeros(C), np.zeros(C)
    f = np.zeros((C, K))
    M = np.zeros(K)
    dM_off = np.zeros((n_terms, K))
    dM_sd = np.zeros((n_terms, K))
    terms, slopes, sq = np.zeros(J), np.zeros(J), np.zeros(J)
    Mk = np.zeros((n_terms, K))
    rw, hw = np.zeros(n_terms), np.zeros(n_terms)
    bk, jk = np.zeros(K), np.zeros(K)  # each outer node's bias and log Jacobian
    kap_out = np.zeros(C)
    kap = 1.0
    m_prev = 0.0
    ib = 1.0 / (sd_b * sd_b)
    for c in range(C):
        lo, hi = start[c], start[c + 1]
        if outer:
            # Gaussian start, then Newton steps with each term's Laplace slope and curvature
            H, S = ib, mu_b * ib
            for i in range(lo, hi):
                w = info[pairs[i]] / (1.0 + info[pairs[i]] * sd[i] ** 2)
                H += w
                S += w * (mode[pairs[i]] - off[i])
            m = S / H
            vc = 0.0
            if trunc:
                # start where the Gaussian guess N(m, 1/H) truncated at 0 peaks on a log scale (the
                # positive root of H b^2 - H m b - 1 = 0; m itself far above 0), mapped to v
                kap = 1.0 / np.sqrt(H)
                m = 0.5 * (m + np.sqrt(m * m + 4.0 / H))
                vc = m / kap
                for _ in range(8):  # g(v) = m / kappa: Newton from above, monotone (g convex, g(v) > v)
                    gv_, cdf, _ = _half_line(vc)
                    vc -= (gv_ - m / kap) / cdf
            m_prev = m
            for it in range(OUTER_STEPS + (TRUNC_EXTRA_STEPS if trunc else 0)):
                if trunc:
                    m = kap * _half_line(vc)[0]
                grad, H = -(m - mu_b) * ib, ib
                for i in range(lo, hi):
                    p, e = pairs[i], m + off[i]
                    if it == 0:
                        r0 = info[p] * (mode[p] - e) / (info[p] + 1.0 / sd[i] ** 2)
                        r, h, _ = _inner_peak(e, sd[i], p, r0, INNER_STEPS, tb)
                    else:  # warm start: the last peak, moved linearly with the centre
                        r0 = rw[i] - hw[i] / (hw[i] + 1.0 / sd[i] ** 2) * (m - m_prev)
                        r, h, _ = _inner_peak(e, sd[i], p, r0, 1, tb)
                    rw[i], hw[i] = r, h
                    grad += r / sd[i] ** 2
                    H += h / (1.0 + sd[i] ** 2 * h)
                m_prev = m
                if trunc:
                    # the same step in v: slope and curvature through b = kappa g(v), plus the
                    # Jacobian's (log Phi: slope phi/Phi, curvature -(phi/Phi)(v + phi/Phi) < 0)
                    _, cdf, pdf = _half_line(vc)
                    mills = pdf / cdf
                    gv = grad * kap * cdf + mills
                    H = max(H * (kap * cdf) ** 2 - grad * kap * pdf + mills * (max(vc, -30.0) + mills), 1e-6)
                    vc += min(max(gv / H, -3.0 / np.sqrt(H)), 3.0 / np.sqrt(H))
                else:
                    m += min(max(grad / H, -3.0 / np.sqrt(H)), 3.0 / np.sqrt(H))
            half = np.sqrt(2.0 / H)
            if trunc:
                m = kap * _half_line(vc)[0]
            for k in range(K):
                if trunc:
                    gk, cdf, _ = _half_line(vc + half * xo[k])
                    bk[k], jk[k] = kap * gk, np.log(kap * cdf)
                else:
                    bk[k] = m + half * xo[k]
        else:
            m, half, vc = 0.0, 0.0, 0.0
        m_out[c], half_out[c], kap_out[c] = (vc if trunc else m), half, kap
        nk = K if outer else 1
        for i in range(lo, hi):
            # each term's peak at the outer centre, and at each node its linear prediction from there
            p, s_ = pairs[i], sd[i]
            iv = 1.0 / (s_ * s_)
            log_s = np.log(s_)
            e = m + off[i]
            if outer:
                r0 = rw[i] - hw[i] / (hw[i] + iv) * (m - m_prev)
                rm, hm, _ = _inner_peak(e, s_, p, r0, 1, tb)
            else:
                r0 = info[p] * (mode[p] - e) / (info[p] + iv)
                rm, hm, _ = _inner_peak(e, s_, p, r0, INNER_STEPS, tb)
            kk = hm / (hm + iv)
            for k in range(nk):
                dx = bk[k] - m if outer else 0.0
                r, prec = rm - kk * dx, hm + iv
                hr = np.sqrt(2.0 / prec)
                mx = -np.inf
                for j in range(J):
                    rj = r + hr * xi[j]
                    v, d1, _ = _spline(e + dx + rj, p, tb)
                    terms[j] = lwi[j] + v - 0.5 * (rj * rj) * iv
                    slopes[j] = d1
                    sq[j] = rj * rj
                    mx = max(mx, terms[j])
                acc = 0.0
                for j in range(J):
                    terms[j] = np.exp(terms[j] - mx)
                    acc += terms[j]
                Mk[i, k] = mx + np.log(acc) + np.log(hr) - LOG_SQRT_2PI - log_s
                if want_grad:
                    go, gs = 0.0, 0.0
                    for j in range(J):
                        nu = terms[j] / acc
                        go += nu * slopes[j]
                        gs += nu * (sq[j] * iv - 1.0) / s_
                    dM_off[i, k], dM_sd[i, k] = go, gs
        for k in range(nk):
            b = bk[k] if outer else 0.0
            fk = 0.0
            if outer:
                fk = -LOG_SQRT_2PI - np.log(sd_b) - 0.5 * ((b - mu_b) / sd_b) ** 2
                if trunc:
                    fk += jk[k]
            for i in range(lo, hi):
                fk += Mk[i, k]
            f[c, k] = fk
            M[k] = fk
        if outer:
            for k in range(K):
                M[k] = lwo[k] + f[c, k]
            loglik[c] = _logsumexp(M, K) + np.log(half)
        else:
            loglik[c] = f[c, 0]
        if want_grad:
            for k in range(nk):
                pik = np.exp(M[k] - (loglik[c] - np.log(half))) if outer else 1.0
                if outer:
                    b = bk[k]
                    d_mu[c] += pik * (b - mu_b) * ib
                    d_sdb[c] += pik * (-1.0 / sd_b + (b - mu_b) ** 2 / sd_b**3)
                for i in range(lo, hi):
                    d_off[i] += pik * dM_off[i, k]
                    d_sd[i] += pik * dM_sd[i, k]
    return loglik, d_mu, d_sdb, d_off, d_sd, m_out, half_out, kap_out, f


@numba.njit(cache=True, parallel=True)
def _outer_nodes(mu_b, sd_b, off, sd, pairs, start, tb, xo, lwo, xi, lwi, trunc):
    """:func:`_campaigns`'s outer centres, half-widths and node integrands for many draws (rows), in parallel."""
    D, C = mu_b.size, start.size - 1
    m, half, kap, f = np.zeros((D, C)), np.zeros((D, C)), np.zeros((D, C)), np.zeros((D, C, xo.size))
    for i in numba.prange(D):
        _, _, _, _, _, m[i], half[i], kap[i], f[i] = _campaigns(mu_b[i], sd_b[i], off[i], sd[i], pairs, start, True, tb,
                                                        xo, lwo, xi, lwi, False, trunc)
    return m, half, kap, f


def _gh(n):
    x, w = np.polynomial.hermite.hermgauss(n)
    return x, np.log(w) + x**2


class CampaignLoglik(Op):
    """Sum of the campaigns' integrated log-likelihoods; inputs ``bias_mean, bias_sd, offsets, sds``.

    The gradient is exact for the computed quadrature with its nodes held fixed (see the module notes).
    """

    def __init__(self, curves: CurveSet, terms: CampaignTerms, outer: bool, trunc: bool = False):
        self.tb = _tables(curves)
        self.pairs = terms.pair.astype(np.int64)
        self.start = terms.start
        self.outer = bool(outer)
        self.trunc = bool(trunc)
        self.xo, self.lwo = _gh(OUTER_NODES)
        self.xi, self.lwi = _gh(INNER_NODES)

    def make_node(self, mu_b, sd_b, off, sd):
        ins = [pt.as_tensor_variable(v).astype("float64") for v in (mu_b, sd_b, off, sd)]
        outs = [pt.dscalar(), pt.dscalar(), pt.dscalar(), pt.dvector(), pt.dvector()]
        return Apply(self, ins, outs)

    def perform(self, node, inputs, outputs):
        mu_b, sd_b, off, sd = inputs
        ll, dmu, dsb, doff, dsd, _, _, _, _ = _campaigns(float(mu_b), float(sd_b), np.asarray(off, float),
                                                     np.asarray(sd, float), self.pairs, self.start, self.outer,
                                                     self.tb, self.xo, self.lwo, self.xi, self.lwi, True,
                                                     self.trunc)
        outputs[0][0] = np.asarray(ll.sum())
        outputs[1][0] = np.asarray(dmu.sum())
        outputs[2][0] = np.asarray(dsb.sum())
        outputs[3][0] = doff
        outputs[4][0] = dsd

    def grad(self, inputs, output_grads):
        outs = self(*inputs)
        g = output_grads[0]
        return [g * outs[1], g * outs[2], g * outs[3], g * outs[4]]


def _pair_inputs(terms: CampaignTerms, centre, tau, sr, ob):
    """``tau`` is per campaign (C,): the target excess's spread; ``sr`` the placebo residuals' (scalar)."""
    """Each term's offset (outcome bias, plus the lift's centre for a target) and spread."""
    is_t = terms.is_target
    off = pt.switch(is_t, centre[terms.campaign], 0.0)
    if ob is not None:
        off = off + ob[terms.outcome]
    sd = pt.switch(is_t, tau[terms.campaign], sr) * pt.ones(terms.pair.size)
    return off, sd


def build_collapsed_model(design, curves: CurveSet, s: ModelSettings, tests: CampaignTests | None = None) -> pm.Model:
    """The PyMC model of the population-level parameters with every campaign's effects integrated.

    Parameters
    ----------
    design : Design
    curves : CurveSet
    s : ModelSettings
        With ``bias_sign="nonnegative"`` each campaign's bias is N(bias_mean, bias_sd) truncated at 0,
        with ``bias_mean >= 0`` (the location of that normal, not the biases' mean): the kernel
        integrates it over its half-line and the truncation's normalizing constant enters here.
    tests : CampaignTests, optional
        Randomized tests (:mod:`liftpool.models.evidence`): each pins its campaign's lift; with
        them the target's excess bias (``excess_mean``, ``excess_sd``) is learned.
    """
    d = design
    terms = campaign_terms(d, curves)
    tests = tests if tests is not None else campaign_tests(d.campaigns, None)
    coords = {"campaign": d.campaigns, "outcome": d.outcomes}
    if d.groups:
        coords["group"] = d.groups
    with pm.Model(coords=coords) as model:
        centre, lift_sd = population_lift(d, s)
        if not terms.corrected:
            # no placebo anywhere: every term is a target, its excess the lift around its centre
            off, sd = _pair_inputs(terms, centre, lift_sd, 1.0, None)
            ll = CampaignLoglik(curves, terms, outer=False)(0.0, 1.0, off, sd)[0]
            pm.Potential("campaign_loglik", ll)
            return model
        residual_sd = pm.HalfNormal("residual_sd", s.residual_sd_scale)
        trunc = s.bias_sign == "nonnegative"
        if terms.single:
            mu_b, sd_b = pt.as_tensor(0.0), pt.as_tensor(float(s.bias_mean_scale))
        else:
            sd_b = pm.HalfNormal("bias_sd", s.bias_sd_scale)
            # truncated: the location is nonnegative too (a negative one with a wide spread mimics the
            # same biases, a long ridge the sampler crosses slowly: ESS 0.1 per draw on six campaigns)
            mu_b = (pm.HalfNormal("bias_mean", s.bias_mean_scale) if trunc
                    else pm.Normal("bias_mean", 0.0, s.bias_mean_scale))
            if trunc:  # each campaign's prior density over b >= 0 is N(b | mu, sd) / Phi(mu / sd)
                pm.Potential("bias_truncation", -terms.n_campaigns * normal_lcdf(0.0, 1.0, mu_b / sd_b))
        ob = None
        if s.outcome_bias:
            ob_sd = pm.HalfNormal("outcome_bias_sd", s.outcome_bias_sd_scale)
            oz = pm.Normal("outcome_bias_z", 0.0, 1.0, dims="outcome")
            ob = pm.Deterministic("outcome_bias", ob_sd * oz, dims="outcome")
        mu_e, sd_e = pt.as_tensor(0.0), pt.as_tensor(0.0)
        if excess_active(s, tests):
            mu_e = pm.Normal("excess_mean", 0.0, s.excess_mean_scale)
            sd_e = pm.HalfNormal("excess_sd", s.excess_sd_scale)
        if tests.n_tested:
            pm.Potential("evidence_loglik", evidence_loglik(centre, lift_sd, tests, log=pt.log))
        # the target's excess over b: lift (given its tests) + excess bias + its own residual
        m_l, v_l = centre, lift_sd**2
        if tests.n_tested:  # only the tested campaigns' entries change (no arithmetic with zero masks in the graph)
            idx = np.flatnonzero(tests.has > 0)
            m_t, v_t = normal_update(centre[idx], v_l[idx], tests.y[idx], tests.se2[idx])
            m_l, v_l = pt.set_subtensor(m_l[idx], m_t), pt.set_subtensor(v_l[idx], v_t)
        tau = pt.sqrt(v_l + residual_sd**2 + sd_e**2)
        off, sd = _pair_inputs(terms, m_l + mu_e, tau, residual_sd, ob)
        ll = CampaignLoglik(curves, terms, outer=True, trunc=trunc)(mu_b, sd_b, off, sd)[0]
        pm.Potential("campaign_loglik", ll)
    return model


def population_lift(d, s: ModelSettings):
    """The lift's population: its ``centre`` and ``spread`` per campaign (C,).

    ``spread`` is ``lift_sd`` (fixed at the prior scale for a single campaign). With groups, a
    grouped campaign's centre adds its group's effect; a campaign without a group keeps the
    portfolio's centre and its group effect is unknown, a fresh N(0, group_sd) draw, so its spread is
    ``sqrt(lift_sd^2 + group_sd^2)`` (:func:`lift_spread`, the same rule in the completion).
    """
    C = d.n_campaigns
    if C == 1:
        return pt.zeros(1), pt.ones(1) * float(s.lift_mean_scale)
    lift_mean = pm.Normal("lift_mean", 0.0, s.lift_mean_scale)
    lift_sd = pm.HalfNormal("lift_sd", s.lift_sd_scale)
    centre = pt.ones(C) * lift_mean
    if d.groups:
        group_sd = pm.HalfNormal("group_sd", s.group_sd_scale)
        # centred: each group's effect is pinned by its campaigns (several per group), and the one
        # weak direction (the groups' mean against lift_mean) is linear, which the dense mass matrix
        # handles; the non-centred form put a funnel there (8 divergences in 2,000 draws on two groups
        # of five campaigns, tests/test_model_options.py)
        g_eff = pm.Normal("group_effect", 0.0, group_sd, dims="group")
        cg = np.maximum(d.campaign_group, 0)
        centre = centre + pt.where(d.campaign_group >= 0, g_eff[cg], 0.0)
        return centre, lift_spread(lift_sd, group_sd, d.campaign_group, pt.sqrt)
    return centre, pt.ones(C) * lift_sd



# ---------------------------------------------------------------------------------------------
# completion: each kept draw's campaign effects from their exact conditionals


def _lagrange(nodes: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Lagrange basis of ``nodes`` evaluated at ``at``: shape (len(at), len(nodes))."""
    L = np.ones((at.size, nodes.size))
    for k in range(nodes.size):
        for j in range(nodes.size):
            if j != k:
                L[:, k] *= (at - nodes[j]) / (nodes[k] - nodes[j])
    return L


def _grid_draw(z: np.ndarray, logd: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One draw per row from the density exp(logd) on the grid ``z`` (log-linear within each cell)."""
    logd = logd - logd.max(axis=-1, keepdims=True)
    dz = np.diff(z)
    a, diff = logd[..., :-1], np.diff(logd, axis=-1)
    small = np.abs(diff) < 1e-8
    safe = np.where(small, 1.0, diff)
    mass = np.where(small, np.exp(a), np.exp(a) * np.expm1(diff) / safe) * dz
    cum = np.cumsum(mass, axis=-1)
    u = rng.uniform(size=logd.shape[:-1]) * cum[..., -1]
    j = np.minimum((cum < u[..., None]).sum(axis=-1), dz.size - 1)

    def take(v):
        return np.take_along_axis(v, j[..., None], axis=-1)[..., 0]

    dj, mj = take(diff), take(mass)
    prev = np.where(j > 0, np.take_along_axis(cum, np.maximum(j - 1, 0)[..., None], axis=-1)[..., 0], 0.0)
    v = np.clip((u - prev) / np.where(mj > 0, mj, 1.0), 0.0, 1.0)
    # inverse CDF of exp(diff * t) on t in [0, 1]
    sj = np.abs(dj) < 1e-8
    t = np.where(sj, v, np.log1p(v * np.expm1(np.where(sj, 0.0, dj))) / np.where(sj, 1.0, dj))
    return z[j] + np.clip(t, 0.0, 1.0) * dz[j]


def campaign_draws(design, curves: CurveSet, s: ModelSettings, post: dict, rng: np.random.Generator,
                   tests: CampaignTests | None = None) -> dict:
    """Complete population-level draws with each campaign's ``bias`` and ``target_excess``.

    ``b_c`` is drawn from its conditional density given the draw's population parameters (the outer
    quadrature's integrand at its nodes over its Gaussian envelope, interpolated through the nodes
    and held at the end nodes' ratio beyond them, on a fine grid of +-6 sd), then ``x_c`` given
    ``b_c`` from its conditional on a grid of +-6 sd around its peak.

    Parameters
    ----------
    post : dict
        Flat (D,) arrays of the sampled population-level variables (and ``group_effect`` (D, G),
        ``outcome_bias`` (D, O) when present).

    Returns
    -------
    dict
        ``post`` with ``bias`` and ``target_excess`` (D, C) added.
    """
    d = design
    C = d.n_campaigns
    D = next(v.shape[0] for v in post.values() if isinstance(v, np.ndarray))
    single = C == 1
    corrected = not d.flags.no_placebo_anywhere
    lm = np.zeros(D) if single else post["lift_mean"]
    lsd = np.full(D, float(s.lift_mean_scale)) if single else post["lift_sd"]
    spread = (lift_spread(lsd, post["group_sd"], d.campaign_group) if "group_sd" in post
              else np.repeat(lsd[:, None], C, axis=1))  # (D, C)
    centre = np.repeat(lm[:, None], C, axis=1)
    if "group_effect" in post:
        cg = np.maximum(d.campaign_group, 0)
        centre = centre + np.where(d.campaign_group >= 0, post["group_effect"][:, cg], 0.0)
    sr = post["residual_sd"] if corrected else np.zeros(D)
    tests = tests if tests is not None else campaign_tests(d.campaigns, None)
    if corrected:  # the target's excess over b: lift given its tests, plus the excess bias and residual
        m_l, v_l = lift_given_tests(centre, spread, tests)
        sde2 = post["excess_sd"] ** 2 if "excess_sd" in post else np.zeros(D)
        centre = m_l + (post["excess_mean"][:, None] if "excess_mean" in post else 0.0)
        tau = np.sqrt(v_l + sr[:, None] ** 2 + sde2[:, None])  # (D, C)
    else:
        tau = spread
    ob = post.get("outcome_bias") if s.outcome_bias else None
    terms = campaign_terms(d, curves)
    tb = _tables(curves)
    xo, lwo = _gh(OUTER_NODES)
    xi, lwi = _gh(INNER_NODES)
    bias = np.zeros((D, C))
    if corrected:
        # the grid reaches past the nodes (+-GRID_REACH sd); beyond them the integrand keeps its
        # ratio to the Gaussian envelope at the end node (the envelope's own tails)
        zb = np.linspace(-GRID_REACH / np.sqrt(2.0), GRID_REACH / np.sqrt(2.0), B_GRID)
        L = _lagrange(xo, np.clip(zb, xo[0], xo[-1]))
        mu = np.zeros(D) if single else post["bias_mean"]
        sdb = np.full(D, float(s.bias_mean_scale)) if single else post["bias_sd"]
        pairs = terms.pair.astype(np.int64)
        trunc = s.bias_sign == "nonnegative"
        for lo in range(0, D, COMPLETION_CHUNK):  # in blocks of draws: the grid is (draws, C, B_GRID)
            sl = slice(lo, min(D, lo + COMPLETION_CHUNK))
            off = np.where(terms.is_target, centre[sl][:, terms.campaign], 0.0)
            if ob is not None:
                off = off + ob[sl][:, terms.outcome]
            sd = np.where(terms.is_target, tau[sl][:, terms.campaign], sr[sl, None])
            m, half, kap, f = _outer_nodes(np.ascontiguousarray(mu[sl], dtype=float), np.ascontiguousarray(sdb[sl], dtype=float),
                                      np.ascontiguousarray(off, dtype=float), np.ascontiguousarray(sd, dtype=float),
                                      pairs, terms.start, tb, xo, lwo, xi, lwi, trunc)
            rho = f + xo**2  # the integrand over its Gaussian envelope: smooth, so interpolated
            logd = -zb**2 + rho @ L.T
            centred = m + half * _grid_draw(zb, logd, rng)
            if trunc:  # v to b = kappa g(v), the vectorized twin of the kernel's _half_line
                centred = np.maximum(centred, -30.0)
                centred = kap * (centred * special.ndtr(centred) + np.exp(-0.5 * centred**2) / np.sqrt(2 * np.pi))
            bias[sl] = centred
    tp = d.target_pair()
    o_t = ob[:, d.pair_outcome[tp]] if ob is not None else 0.0
    eta = bias + o_t
    excess = _excess_draws(curves, tp, eta, centre, tau, rng)
    out = dict(post)
    out["bias"] = bias
    out["target_excess"] = excess
    return out


def _excess_draws(curves: CurveSet, tp, eta, centre, tau, rng):
    """x | b: density N(x | centre, tau) exp(curve_t(eta + x)), on a grid around its Laplace peak."""
    D, C = eta.shape
    pairs = np.broadcast_to(tp, (D, C))
    inf = curves.informative[tp]
    x = centre.copy()
    prec = 1.0 / tau**2
    for _ in range(8):
        _, g, h = curves.evaluate(eta + x, pairs, derivatives=True)
        g, h = np.where(inf, g, 0.0), np.where(inf, np.maximum(-h, 0.0), 0.0)
        prec = h + 1.0 / tau**2
        x = x + np.clip((g - (x - centre) / tau**2) / prec, -3.0 * tau, 3.0 * tau)
    sd = 1.0 / np.sqrt(prec)
    z = np.linspace(-GRID_REACH, GRID_REACH, X_GRID)
    out = np.empty((D, C))
    for lo in range(0, D, 256):
        sl = slice(lo, min(D, lo + 256))
        xs = x[sl, :, None] + sd[sl, :, None] * z[None, None, :]
        ll = curves.evaluate(eta[sl, :, None] + xs, np.broadcast_to(tp[None, :, None], xs.shape))
        ll = np.where(inf[None, :, None], ll, 0.0)
        logd = ll - 0.5 * ((xs - centre[sl, :, None]) / tau[sl, :, None]) ** 2
        out[sl] = x[sl] + sd[sl] * _grid_draw(z, logd, rng)
    return out
