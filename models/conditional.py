"""The conditional likelihood of stratified 2x2 tables, computed exactly (compiled), and its smooth interpolant.

Given a cell's margins (seen users ``n1``, unseen users ``n0``, total conversions ``m``), the
seen conversions follow Fisher's noncentral hypergeometric distribution with the odds ratio
``exp(psi)`` of seen against unseen (Cox 1958; Breslow & Day 1980, ch. 4)::

    log p(x1 | m, psi) = log C(n1, x1) + log C(n0, m - x1) + x1 psi
                         - log sum_u C(n1, u) C(n0, m - u) exp(u psi)

The cell baseline drops out exactly.  A (campaign, outcome) pair's log-likelihood is the sum over
its cells: one smooth, concave curve in ``psi``.  Each curve is evaluated once, exactly (the
normalizing sum over each cell's whole support, in log space), at nodes that are uniform in
``t = asinh((psi - centre) / scale)`` (dense near the curve's peak, sparse far away), together
with its first and second derivatives (``x1 - E[U]`` and ``-Var[U]``).  Between nodes the curve is
a cubic Hermite interpolant in ``t`` (C1, exact at the nodes); beyond the outermost nodes it
continues as the second-order Taylor expansion at the end node, so it stays concave.

The same interpolant is written twice, once in NumPy (:meth:`CurveSet.evaluate`) and once in
PyTensor (:func:`curve_logp`), and the tests hold them equal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np
from scipy.special import gammaln, logsumexp

__all__ = ["CellTable", "cell_tables", "cell_logpmf", "cell_moments", "CurveSet", "build_curves",
           "curve_logp", "conditional_mle", "strata_moments", "CURVE_NODES", "CURVE_REACH"]

#: Nodes per curve.
CURVE_NODES = 240
#: The nodes reach at least this far (log odds) on both sides of zero.
CURVE_REACH = 12.0
#: ... and at least this many curve scales (standard errors) on both sides of the centre,
CURVE_SCALES = 40.0
#: ... but never beyond this (log odds); the quadratic continuation takes over there.
CURVE_LIMIT = 25.0
#: Largest node scale and centre (log odds): weak curves get their nodes where posteriors lie.
MAX_SCALE, MAX_CENTRE = 0.5, 3.0


@dataclass(frozen=True)
class CellTable:
    """The stratified 2x2 tables of a design, one row per stratum (campaign, outcome, cell).

    Attributes
    ----------
    n1, n0 : ndarray of int
        Seen and unseen users.
    x1, x0 : ndarray of int
        Seen and unseen conversions.
    pair : ndarray of int
        The (campaign, outcome) pair of each stratum.
    """

    n1: np.ndarray
    n0: np.ndarray
    x1: np.ndarray
    x0: np.ndarray
    pair: np.ndarray

    @property
    def m(self) -> np.ndarray:
        return self.x1 + self.x0

    @property
    def lo(self) -> np.ndarray:
        """Smallest possible seen count given the margins."""
        return np.maximum(0, self.m - self.n0)

    @property
    def hi(self) -> np.ndarray:
        """Largest possible seen count given the margins."""
        return np.minimum(self.n1, self.m)

    @property
    def informative(self) -> np.ndarray:
        """Strata whose seen count is not fixed by the margins (the others carry no information)."""
        return self.hi > self.lo


def cell_tables(design) -> CellTable:
    """The 2x2 table of every stratum of a :class:`~liftpool.models.design.Design`."""
    S = len(design.stratum_pair)
    seen = design.row_seen == 1
    out = {}
    for name, mask in (("1", seen), ("0", ~seen)):
        out["n" + name] = np.bincount(design.row_stratum[mask], weights=design.users[mask], minlength=S)
        out["x" + name] = np.bincount(design.row_stratum[mask], weights=design.conversions[mask], minlength=S)
    return CellTable(n1=out["n1"].astype(np.int64), n0=out["n0"].astype(np.int64), x1=out["x1"].astype(np.int64),
                     x0=out["x0"].astype(np.int64), pair=np.asarray(design.stratum_pair))


def _log_choose(n, k):
    return gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0)


def _support_terms(n1: int, n0: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = max(0, m - n0), min(n1, m)
    u = np.arange(lo, hi + 1, dtype=float)
    return u, _log_choose(n1, u) + _log_choose(n0, m - u)


def cell_logpmf(x1, n1, n0, m, psi) -> np.ndarray:
    """Exact log pmf of one cell's seen conversions given its margins, at log odds ratios ``psi``.

    Parameters
    ----------
    x1, n1, n0, m : int
        Seen conversions, seen users, unseen users, total conversions.
    psi : array_like
        Log odds ratios.
    """
    psi = np.atleast_1d(np.asarray(psi, dtype=float))
    u, w = _support_terms(int(n1), int(n0), int(m))
    norm = logsumexp(w[None, :] + u[None, :] * psi[:, None], axis=1)
    return _log_choose(n1, x1) + _log_choose(n0, m - x1) + x1 * psi - norm


def cell_moments(n1: int, n0: int, m: int, psi) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Log normalizing sum, mean and variance of one cell's seen count at log odds ratios ``psi``."""
    psi = np.atleast_1d(np.asarray(psi, dtype=float))
    u, w = _support_terms(int(n1), int(n0), int(m))
    a = w[None, :] + u[None, :] * psi[:, None]
    norm = logsumexp(a, axis=1)
    p = np.exp(a - norm[:, None])
    mean = p @ u
    var = np.maximum(p @ (u * u) - mean**2, 0.0)
    return norm, mean, var


@numba.njit(cache=True)
def _log_choose_1(n, k):
    return math.lgamma(n + 1.0) - math.lgamma(k + 1.0) - math.lgamma(n - k + 1.0)


@numba.njit(cache=True)
def _stratum_fgh(n1, n0, m, x1, psi, q, f, g, h, add):
    """One stratum's log-likelihood and its two derivatives at each ``psi``, into (or onto) f, g, h.

    The normalizing sum runs over the whole support ``lo..hi`` by the ratio of consecutive terms,
    ``q_u exp(psi)`` with ``q_u = (n1 - u)(m - u) / ((u + 1)(n0 - m + u + 1))``, rescaled whenever it
    grows large: no exponential per term, and exact to rounding.
    """
    lo, hi = max(0, m - n0), min(n1, m)
    W = hi - lo + 1
    for j in range(W - 1):
        u = lo + j
        q[j] = (n1 - u) * (m - u) / ((u + 1.0) * (n0 - m + u + 1.0))
    const = _log_choose_1(n1, x1) + _log_choose_1(n0, m - x1)
    w_lo = _log_choose_1(n1, lo) + _log_choose_1(n0, m - lo)
    for i in range(psi.size):
        ps = psi[i]
        e = math.exp(ps)
        t, s0, s1, s2, scale = 1.0, 0.0, 0.0, 0.0, 0.0
        for j in range(W):
            s0 += t
            s1 += t * j
            s2 += t * j * j
            if j < W - 1:
                t *= q[j] * e
                if t > 1e150:
                    t *= 1e-150
                    s0 *= 1e-150
                    s1 *= 1e-150
                    s2 *= 1e-150
                    scale += 345.38776394910684  # log(1e150)
        mean = s1 / s0
        var = max(s2 / s0 - mean * mean, 0.0)
        norm = w_lo + lo * ps + scale + math.log(s0)
        fi, gi, hi_ = const + x1 * ps - norm, x1 - (lo + mean), -var
        if add:
            f[i] += fi
            g[i] += gi
            h[i] += hi_
        else:
            f[i], g[i], h[i] = fi, gi, hi_


@numba.njit(cache=True, parallel=True)
def _strata_kernel(n1, n0, m, x1, psi):
    S, G = psi.shape
    f, g, h = np.zeros((S, G)), np.zeros((S, G)), np.zeros((S, G))
    for k in numba.prange(S):
        q = np.empty(max(1, min(n1[k], m[k]) - max(0, m[k] - n0[k]) + 1))
        _stratum_fgh(n1[k], n0[k], m[k], x1[k], psi[k], q, f[k], g[k], h[k], False)
    return f, g, h


@numba.njit(cache=True, parallel=True)
def _pairs_kernel(start, n1, n0, m, x1, psi):
    P, G = psi.shape
    f, g, h = np.zeros((P, G)), np.zeros((P, G)), np.zeros((P, G))
    for p in numba.prange(P):
        for k in range(start[p], start[p + 1]):
            q = np.empty(max(1, min(n1[k], m[k]) - max(0, m[k] - n0[k]) + 1))
            _stratum_fgh(n1[k], n0[k], m[k], x1[k], psi[p], q, f[p], g[p], h[p], True)
    return f, g, h


def _ints(v) -> np.ndarray:
    return np.ascontiguousarray(v, dtype=np.int64)


def strata_moments(cells: CellTable, idx: np.ndarray, psi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each stratum's (log-likelihood, its derivative, its second derivative) at its own log odds ratios.

    Exact: every stratum's whole support enters the normalizing sum (compiled, in parallel over strata).

    Parameters
    ----------
    cells : CellTable
    idx : ndarray of int, shape (S,)
        The strata.
    psi : ndarray, shape (S, G)
        Log odds ratios at which to evaluate each stratum.

    Returns
    -------
    f, g, h : ndarray, shape (S, G)
    """
    idx = np.asarray(idx)
    psi = np.ascontiguousarray(psi, dtype=float)
    return _strata_kernel(_ints(cells.n1[idx]), _ints(cells.n0[idx]), _ints(cells.m[idx]), _ints(cells.x1[idx]), psi)


def _pair_sums(cells: CellTable, idx: np.ndarray, psi_pair: np.ndarray, n_pairs: int):
    """Sum over strata of (f, g, h) per pair, each pair evaluated at its own ``psi_pair[p]`` (P, G)."""
    idx = np.asarray(idx)
    idx = idx[np.argsort(cells.pair[idx], kind="stable")]
    start = np.searchsorted(cells.pair[idx], np.arange(n_pairs + 1)).astype(np.int64)
    f, g, h = _pairs_kernel(start, _ints(cells.n1[idx]), _ints(cells.n0[idx]), _ints(cells.m[idx]),
                            _ints(cells.x1[idx]), np.ascontiguousarray(psi_pair, dtype=float))
    return [f, g, h]


def conditional_mle(cells: CellTable, idx: np.ndarray, penalized: bool = False,
                    tol: float = 1e-10) -> tuple[float, float]:
    """Maximum of one pair's conditional log-likelihood and the curvature there.

    Parameters
    ----------
    cells : CellTable
    idx : ndarray of int
        The pair's strata.
    penalized : bool
        Add Firth's penalty ``0.5 log I(psi)`` (Jeffreys prior), which keeps the estimate finite
        when every conversion of the pair is in one arm.

    Returns
    -------
    psi, information : float
        The estimate (``+-inf`` when the unpenalized maximum is at infinity) and ``-l''(psi)``.
    """
    idx = np.asarray(idx)
    idx = idx[cells.informative[idx]]
    one = CellTable(cells.n1[idx], cells.n0[idx], cells.x1[idx], cells.x0[idx], np.zeros(idx.size, dtype=int))
    psi, info = _modes(one, np.arange(idx.size), 1, penalized, tol)
    return float(psi[0]), float(info[0])


def _modes(cells: CellTable, idx: np.ndarray, n_pairs: int, penalized: bool,
           tol: float = 1e-10) -> tuple[np.ndarray, np.ndarray]:
    """Newton's method on every pair at once: the (penalized) maximum and the information there."""
    psi = np.zeros(n_pairs)
    active = np.ones(n_pairs, dtype=bool)
    eps = 1e-4
    for _ in range(100):
        grid = psi[:, None] + (np.array([0.0, -eps, eps]) if penalized else np.zeros(1))[None, :]
        _, g, h = _pair_sums(cells, idx, grid, n_pairs)
        info = -h[:, 0]
        grad = g[:, 0].copy()
        if penalized:
            with np.errstate(divide="ignore", invalid="ignore"):
                pen = 0.25 * (np.log(-h[:, 2]) - np.log(-h[:, 1])) / eps
            grad += np.where(np.isfinite(pen), pen, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.clip(np.where(info > 1e-300, grad / info, np.sign(grad) * 2.0), -2.0, 2.0)
        step = np.where(active, step, 0.0)
        psi = psi + step
        active &= (np.abs(step) >= tol) & (np.abs(psi) <= 40)
        if not active.any():
            break
    _, _, h = _pair_sums(cells, idx, psi[:, None], n_pairs)
    info = -h[:, 0]
    far = np.abs(psi) > 40
    with np.errstate(invalid="ignore"):  # sign(nan) * inf for a pair without information: still nan
        psi = np.where(far, np.sign(psi) * np.inf, psi)
    return psi, np.where(far, 0.0, info)


@dataclass
class CurveSet:
    """Interpolation tables of the pair log-likelihood curves.

    Node ``j`` of pair ``p`` sits at ``t = t_lo[p] + j dt[p]``, ``psi = centre[p] + scale[p] sinh(t)``.

    Attributes
    ----------
    centre, scale, t_lo, dt : ndarray, shape (P,)
    f, g : ndarray, shape (P, G)
        Log-likelihood and its derivative in ``t`` at the nodes.
    end_f, end_d1, end_d2 : ndarray, shape (P, 2)
        Value, first and second derivative in ``psi`` at the lower and upper end nodes.
    mode, information : ndarray, shape (P,)
        Firth-penalized maximum of each curve and the curve's curvature there: the centre and
        precision of its Gaussian approximation (the quick mode's estimate and 1 / se^2).
    informative : ndarray of bool, shape (P,)
        Pairs with at least one informative stratum (the others have a flat curve: zero).
    """

    centre: np.ndarray
    scale: np.ndarray
    t_lo: np.ndarray
    dt: np.ndarray
    f: np.ndarray
    g: np.ndarray
    end_f: np.ndarray
    end_d1: np.ndarray
    end_d2: np.ndarray
    mode: np.ndarray
    information: np.ndarray
    informative: np.ndarray

    @property
    def psi_lo(self) -> np.ndarray:
        return self.centre + self.scale * np.sinh(self.t_lo)

    @property
    def psi_hi(self) -> np.ndarray:
        return self.centre + self.scale * np.sinh(self.t_lo + self.dt * (self.f.shape[1] - 1))

    def evaluate(self, psi, pairs=None, derivatives: bool = False):
        """The interpolated log-likelihood of ``pairs`` at ``psi`` (broadcast), in NumPy.

        With ``derivatives``, also the first and second derivative in ``psi``.
        """
        pairs = np.arange(self.centre.size) if pairs is None else np.asarray(pairs)
        psi = np.asarray(psi, dtype=float)
        c, a, t0, dt = self.centre[pairs], self.scale[pairs], self.t_lo[pairs], self.dt[pairs]
        G = self.f.shape[1]
        z = (psi - c) / a
        t = np.arcsinh(z)
        u = (t - t0) / dt
        j = np.clip(np.floor(u), 0, G - 2).astype(np.int64)
        s = np.clip(u - j, 0.0, 1.0)
        pj = np.broadcast_to(pairs, j.shape)
        f0, f1 = self.f[pj, j], self.f[pj, j + 1]
        g0, g1 = self.g[pj, j] * dt, self.g[pj, j + 1] * dt
        h00, h10, h01, h11 = 2 * s**3 - 3 * s**2 + 1, s**3 - 2 * s**2 + s, -2 * s**3 + 3 * s**2, s**3 - s**2
        inner = h00 * f0 + h10 * g0 + h01 * f1 + h11 * g1
        lo_d, hi_d = psi - self.psi_lo[pairs], psi - self.psi_hi[pairs]
        below = self.end_f[pairs, 0] + self.end_d1[pairs, 0] * lo_d + 0.5 * self.end_d2[pairs, 0] * lo_d**2
        above = self.end_f[pairs, 1] + self.end_d1[pairs, 1] * hi_d + 0.5 * self.end_d2[pairs, 1] * hi_d**2
        val = np.where(u < 0, below, np.where(u > G - 1, above, inner))
        val = np.where(self.informative[pairs], val, 0.0)
        if not derivatives:
            return val
        # derivatives of the Hermite cubic in s, then the chain rule to psi
        d00, d10, d01, d11 = 6 * s**2 - 6 * s, 3 * s**2 - 4 * s + 1, -6 * s**2 + 6 * s, 3 * s**2 - 2 * s
        e00, e10, e01, e11 = 12 * s - 6, 6 * s - 4, -12 * s + 6, 6 * s - 2
        dv_ds = d00 * f0 + d10 * g0 + d01 * f1 + d11 * g1
        d2v_ds2 = e00 * f0 + e10 * g0 + e01 * f1 + e11 * g1
        dt_dpsi = 1.0 / (a * np.sqrt(1.0 + z**2))
        d2t_dpsi2 = -z / (a**2 * (1.0 + z**2) ** 1.5)
        ds = dt_dpsi / dt
        d1 = dv_ds * ds
        d2 = d2v_ds2 * ds**2 + dv_ds * d2t_dpsi2 / dt
        d1 = np.where(u < 0, self.end_d1[pairs, 0] + self.end_d2[pairs, 0] * lo_d,
                      np.where(u > G - 1, self.end_d1[pairs, 1] + self.end_d2[pairs, 1] * hi_d, d1))
        d2 = np.where(u < 0, self.end_d2[pairs, 0], np.where(u > G - 1, self.end_d2[pairs, 1], d2))
        return val, np.where(self.informative[pairs], d1, 0.0), np.where(self.informative[pairs], d2, 0.0)


def build_curves(cells: CellTable, n_pairs: int, n_nodes: int = CURVE_NODES) -> CurveSet:
    """Evaluate every pair's conditional log-likelihood curve exactly at its nodes.

    Parameters
    ----------
    cells : CellTable
    n_pairs : int
        Number of (campaign, outcome) pairs (``cells.pair`` indexes them).
    n_nodes : int
        Nodes per curve.
    """
    P = n_pairs
    idx = np.flatnonzero(cells.informative)
    informative = np.bincount(cells.pair[idx], minlength=P) > 0
    mode, information = _modes(cells, idx, P, penalized=True)
    informative &= np.isfinite(mode)
    mode = np.where(informative, mode, 0.0)
    information = np.where(informative, information, 0.0)
    # nodes dense near the peak; a weak curve (its peak far out or flat) gets them near zero,
    # where its posterior lies
    scale = np.minimum(1.0 / np.sqrt(np.maximum(information, 1e-12)), MAX_SCALE)
    centre = np.clip(mode, -MAX_CENTRE, MAX_CENTRE)
    lo_psi = np.maximum(np.minimum(-CURVE_REACH, centre - CURVE_SCALES * scale), -CURVE_LIMIT)
    hi_psi = np.minimum(np.maximum(CURVE_REACH, centre + CURVE_SCALES * scale), CURVE_LIMIT)
    t_lo, t_hi = np.arcsinh((lo_psi - centre) / scale), np.arcsinh((hi_psi - centre) / scale)
    dt = (t_hi - t_lo) / (n_nodes - 1)
    t = t_lo[:, None] + dt[:, None] * np.arange(n_nodes)[None, :]
    psi = centre[:, None] + scale[:, None] * np.sinh(t)
    f, g, h = _pair_sums(cells, idx, psi, P)
    end_f, end_d1, end_d2 = f[:, [0, -1]], g[:, [0, -1]], h[:, [0, -1]]
    g = g * scale[:, None] * np.cosh(t)
    return CurveSet(centre=centre, scale=scale, t_lo=t_lo, dt=dt, f=f, g=g, end_f=end_f, end_d1=end_d1,
                    end_d2=end_d2, mode=mode, information=information, informative=informative)


def curve_logp(curves: CurveSet, psi, pairs: np.ndarray):
    """The interpolated log-likelihood of ``pairs`` at the PyTensor tensor ``psi`` (same shape as ``pairs``
    or broadcasting against it on the last axis); the PyTensor twin of :meth:`CurveSet.evaluate`."""
    import pytensor.tensor as pt

    pairs = np.asarray(pairs)
    G = curves.f.shape[1]
    c, a = pt.as_tensor(curves.centre[pairs]), pt.as_tensor(curves.scale[pairs])
    t0, dt = pt.as_tensor(curves.t_lo[pairs]), pt.as_tensor(curves.dt[pairs])
    t = pt.arcsinh((psi - c) / a)
    u = (t - t0) / dt
    j = pt.cast(pt.clip(pt.floor(u), 0, G - 2), "int64")
    s = pt.clip(u - j, 0.0, 1.0)
    # the node tables stay one (P, G) constant however many evaluations index them
    F = pt.as_tensor(curves.f)
    Gd = pt.as_tensor(curves.g * curves.dt[:, None])
    rows = pt.as_tensor(pairs.astype(np.int64))
    if psi.ndim > 1:
        rows = pt.shape_padleft(rows, psi.ndim - 1)
        rows = pt.broadcast_to(rows, j.shape)
    f0, f1 = F[rows, j], F[rows, j + 1]
    g0, g1 = Gd[rows, j], Gd[rows, j + 1]
    s2, s3 = s * s, s * s * s
    inner = (2 * s3 - 3 * s2 + 1) * f0 + (s3 - 2 * s2 + s) * g0 + (-2 * s3 + 3 * s2) * f1 + (s3 - s2) * g1
    lo_d = psi - pt.as_tensor(curves.psi_lo[pairs])
    hi_d = psi - pt.as_tensor(curves.psi_hi[pairs])
    ef, e1, e2 = curves.end_f[pairs], curves.end_d1[pairs], curves.end_d2[pairs]
    below = ef[:, 0] + e1[:, 0] * lo_d + 0.5 * e2[:, 0] * lo_d**2
    above = ef[:, 1] + e1[:, 1] * hi_d + 0.5 * e2[:, 1] * hi_d**2
    val = pt.switch(pt.lt(u, 0), below, pt.switch(pt.gt(u, G - 1), above, inner))
    return pt.switch(pt.as_tensor(curves.informative[pairs]), val, 0.0)
