"""The collapsed full model: its integrated likelihood against brute-force sums, its gradient against
finite differences, and its completion draws against the exact conditional density.

The references are computed here by dense trapezoid sums on the same curves (a general-purpose
numerical method: the trapezoid rule converges for these smooth integrands); the counts are
invented (the shape suite of data_prep/shapes.py, simulations only).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from liftpool.data_prep.shapes import shape_counts
from liftpool.models import ModelSettings, make_design
from liftpool.models import collapsed as co
from liftpool.models.conditional import build_curves, cell_tables

pytestmark = pytest.mark.slow  # dense brute-force sums


def setup(shape, seed=3):
    counts, _ = shape_counts(shape, seed)
    d = make_design(counts)
    curves = build_curves(cell_tables(d), len(d.pair_campaign))
    return d, curves, co.campaign_terms(d, curves)


def kernel(curves, terms, mu_b, sd_b, off, sd, outer=True, grad=False, nodes=None, trunc=False):
    xo, lwo = co._gh(nodes or co.OUTER_NODES)
    xi, lwi = co._gh(nodes or co.INNER_NODES)
    return co._campaigns(mu_b, sd_b, off, sd, terms.pair.astype(np.int64), terms.start, outer, co._tables(curves),
                         xo, lwo, xi, lwi, grad, trunc)


def log_density(curves, terms, c, b, log_prior, off, sd, n_r=801):
    """log of N-prior(b) prod_i int exp(curve_i(b + off_i + r)) N(r | 0, sd_i) dr on the grid ``b``
    (each residual integral a trapezoid sum over +-8 sd)."""
    logf = np.array(log_prior, dtype=float)
    for i in range(terms.start[c], terms.start[c + 1]):
        r = np.linspace(-8 * sd[i], 8 * sd[i], n_r)
        ll = curves.evaluate(b[:, None] + off[i] + r[None, :], np.full((b.size, r.size), terms.pair[i]))
        w = ll + stats.norm.logpdf(r, 0, sd[i])[None, :]
        mx = w.max(axis=1, keepdims=True)
        logf += mx[:, 0] + np.log(np.trapezoid(np.exp(w - mx), r, axis=1))
    return logf


def log_trapezoid(logf, x):
    mx = logf.max()
    return mx + np.log(np.trapezoid(np.exp(logf - mx), x))


def brute_force(curves, terms, c, mu_b, sd_b, off, sd, n=1601):
    """log int N(b | mu_b, sd_b) prod_i int exp(curve_i(b + off_i + r)) N(r | 0, sd_i) dr db, trapezoid sums."""
    b = np.linspace(mu_b - 8 * sd_b, mu_b + 8 * sd_b, n)
    return log_trapezoid(log_density(curves, terms, c, b, stats.norm.logpdf(b, mu_b, sd_b), off, sd, n), b)


@pytest.mark.parametrize("shape", ["sparse", "zero_arm", "one_cell"])
def test_integrated_likelihood_matches_brute_force(shape):
    d, curves, terms = setup(shape)
    # a wide population (the bias integral far from Gaussian) and a tight one
    for mu_b, sd_b, sr, tau in ((0.2, 0.3, 0.1, 0.3), (0.3, 0.05, 0.02, 0.06)):
        off = np.where(terms.is_target, 0.15, 0.0)
        sd = np.where(terms.is_target, tau, sr)
        ll = kernel(curves, terms, mu_b, sd_b, off, sd)[0]
        for c in range(min(3, d.n_campaigns)):
            ref = brute_force(curves, terms, c, mu_b, sd_b, off, sd)
            # measured: at most 2e-7 on these shapes and spreads (5e-5 on the sparse shape at bias_sd 0.6)
            assert ll[c] == pytest.approx(ref, abs=3e-5), (shape, c, ll[c], ref)


def brute_force_truncated(curves, terms, c, mu_b, sd_b, off, sd, n=2001):
    """The same integral with the bias's prior N(mu_b, sd_b) cut at 0 (not renormalized, as in the kernel),
    by a trapezoid sum over v with b = softplus(v): a change of variable that puts a fine grid where the
    density piles up against the bound."""
    v = np.linspace(-25.0, 6.0, n)
    b = np.logaddexp(0.0, v)
    log_prior = stats.norm.logpdf(b, mu_b, sd_b) - np.logaddexp(0.0, -v)  # + log d softplus / dv
    return log_trapezoid(log_density(curves, terms, c, b, log_prior, off, sd, n_r=401), v)


@pytest.mark.parametrize("shape", ["sparse", "zero_arm", "one_cell"])
def test_truncated_bias_integral_matches_brute_force(shape):
    d, curves, terms = setup(shape)
    # wide and tight populations, centred above, at and below the bound (the shapes' own biases are
    # drawn unrestricted, so several campaigns' data press against 0)
    for mu_b, sd_b, sr, tau in ((0.2, 0.3, 0.1, 0.3), (0.3, 0.05, 0.02, 0.06), (-0.2, 0.2, 0.05, 0.1),
                                (0.0, 0.05, 0.03, 0.1)):
        off = np.where(terms.is_target, 0.15, 0.0)
        sd = np.where(terms.is_target, tau, sr)
        ll = kernel(curves, terms, mu_b, sd_b, off, sd, trunc=True)[0]
        for c in range(min(4, d.n_campaigns)):
            ref = brute_force_truncated(curves, terms, c, mu_b, sd_b, off, sd)
            # measured: at most 9e-5 on these shapes and spreads (with b = softplus(v) in the kernel
            # instead of the half-line map, errors were up to 0.04)
            assert ll[c] == pytest.approx(ref, abs=2e-4), (shape, mu_b, c, ll[c], ref)


@pytest.mark.parametrize("trunc", [False, True])
def test_gradient_matches_finite_differences(trunc):
    d, curves, terms = setup("sparse")
    off = np.where(terms.is_target, 0.15, 0.0)
    sd = np.where(terms.is_target, 0.2, 0.08)
    args = dict(mu_b=0.2, sd_b=0.15)
    out = kernel(curves, terms, args["mu_b"], args["sd_b"], off, sd, grad=True, trunc=trunc)
    h = 1e-5

    def total(mu_b, sd_b, off, sd):
        return kernel(curves, terms, mu_b, sd_b, off, sd, trunc=trunc)[0].sum()

    fd_mu = (total(0.2 + h, 0.15, off, sd) - total(0.2 - h, 0.15, off, sd)) / (2 * h)
    fd_sb = (total(0.2, 0.15 + h, off, sd) - total(0.2, 0.15 - h, off, sd)) / (2 * h)
    assert out[1].sum() == pytest.approx(fd_mu, rel=1e-3, abs=1e-3)
    assert out[2].sum() == pytest.approx(fd_sb, rel=1e-3, abs=1e-3)
    for i in (0, 1, len(off) - 1):
        e = np.zeros_like(off)
        e[i] = h
        fd_o = (total(0.2, 0.15, off + e, sd) - total(0.2, 0.15, off - e, sd)) / (2 * h)
        fd_s = (total(0.2, 0.15, off, sd + e) - total(0.2, 0.15, off, sd - e)) / (2 * h)
        assert out[3][i] == pytest.approx(fd_o, rel=1e-3, abs=1e-3)
        assert out[4][i] == pytest.approx(fd_s, rel=1e-3, abs=1e-3)


def test_bias_draws_follow_the_exact_conditional():
    d, curves, terms = setup("sparse")
    s = ModelSettings(likelihood="conditional")
    D = 6000
    post = {"bias_mean": np.full(D, 0.2), "bias_sd": np.full(D, 0.3), "residual_sd": np.full(D, 0.1),
            "lift_mean": np.full(D, 0.15), "lift_sd": np.full(D, 0.2)}
    out = co.campaign_draws(d, curves, s, post, np.random.default_rng(5))
    off = np.where(terms.is_target, 0.15, 0.0)
    sd = np.where(terms.is_target, np.hypot(0.2, 0.1), 0.1)
    for c in range(3):
        # the exact conditional density of b_c on a dense grid (trapezoid), its quantiles
        b = np.linspace(0.2 - 2.4, 0.2 + 2.4, 2401)
        logf = log_density(curves, terms, c, b, stats.norm.logpdf(b, 0.2, 0.3), off, sd)
        pdf = np.exp(logf - logf.max())
        cdf = np.cumsum(pdf)
        cdf /= cdf[-1]
        for q in (0.05, 0.5, 0.95):
            exact = np.interp(q, cdf, b)
            got = np.quantile(out["bias"][:, c], q)
            sd_c = np.sqrt(np.sum(pdf * b**2) / pdf.sum() - (np.sum(pdf * b) / pdf.sum()) ** 2)
            # Monte Carlo error of a quantile of 6000 draws: well under 0.1 posterior sd
            assert abs(got - exact) < 0.1 * sd_c, (c, q, got, exact)


def test_truncated_bias_draws_follow_the_exact_conditional():
    # bias_sign="nonnegative": the draws are mapped from the half-line variable; several of the sparse
    # shape's campaigns sit near the bound
    d, curves, terms = setup("sparse")
    s = ModelSettings(likelihood="conditional", bias_sign="nonnegative")
    D = 6000
    post = {"bias_mean": np.full(D, 0.05), "bias_sd": np.full(D, 0.2), "residual_sd": np.full(D, 0.1),
            "lift_mean": np.full(D, 0.15), "lift_sd": np.full(D, 0.2)}
    out = co.campaign_draws(d, curves, s, post, np.random.default_rng(6))
    assert (out["bias"] >= 0).all()
    off = np.where(terms.is_target, 0.15, 0.0)
    sd = np.where(terms.is_target, np.hypot(0.2, 0.1), 0.1)
    for c in range(4):
        b = np.linspace(0.0, 1.6, 3201)
        logf = log_density(curves, terms, c, b, stats.norm.logpdf(b, 0.05, 0.2), off, sd)
        pdf = np.exp(logf - logf.max())
        cdf = np.concatenate([[0.0], np.cumsum((pdf[1:] + pdf[:-1]) / 2)])
        cdf /= cdf[-1]
        sd_c = np.sqrt(np.trapezoid(pdf * b**2, b) / np.trapezoid(pdf, b) - (np.trapezoid(pdf * b, b) / np.trapezoid(pdf, b)) ** 2)
        for q in (0.05, 0.5, 0.95):
            exact = np.interp(q, cdf, b)
            got = np.quantile(out["bias"][:, c], q)
            assert abs(got - exact) < 0.1 * sd_c, (c, q, got, exact)
