"""The conditional likelihood of stratified 2x2 tables against outside references, and its interpolant."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from liftpool.models.conditional import (
    CellTable,
    build_curves,
    cell_logpmf,
    conditional_mle,
    strata_moments,
)

RNG = np.random.default_rng(7)


def random_cells(n_pairs=12, per_pair=3, seed=7):
    rng = np.random.default_rng(seed)
    S = n_pairs * per_pair
    n1 = rng.integers(20, 20_000, S)
    n0 = rng.integers(20, 20_000, S)
    p = 10 ** rng.uniform(-3, -1, S)
    x1 = rng.binomial(n1, np.minimum(p * 1.3, 1))
    x0 = rng.binomial(n0, p)
    x1[-per_pair:] = 0  # the last pair has no seen conversion at all
    return CellTable(n1=n1, n0=n0, x1=x1, x0=x0, pair=np.repeat(np.arange(n_pairs), per_pair))


@pytest.mark.parametrize("k", range(6))
def test_cell_logpmf_equals_scipy_nchypergeom_fisher(k):
    # reference: scipy.stats.nchypergeom_fisher(M total users, n seen users, N converters, odds)
    # (shared/references.md, "Conditional likelihood of stratified 2x2 tables")
    c = random_cells()
    m = int(c.x1[k] + c.x0[k])
    psi = np.array([-1.5, -0.2, 0.0, 0.4, 1.7])
    ours = cell_logpmf(c.x1[k], c.n1[k], c.n0[k], m, psi)
    ref = stats.nchypergeom_fisher.logpmf(c.x1[k], c.n1[k] + c.n0[k], c.n1[k], m, np.exp(psi))
    np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-10)


def test_one_table_mle_equals_scipy_conditional_odds_ratio():
    # reference: scipy.stats.contingency.odds_ratio(table, kind="conditional"): the conditional MLE
    table = np.array([[37, 1963], [21, 1979]])
    c = CellTable(n1=np.array([2000]), n0=np.array([2000]), x1=np.array([37]), x0=np.array([21]),
                  pair=np.array([0]))
    psi, info = conditional_mle(c, np.array([0]))
    ref = stats.contingency.odds_ratio(table, kind="conditional").statistic
    assert psi == pytest.approx(np.log(ref), abs=1e-7)
    assert info > 0


def test_stratified_mle_equals_statsmodels_conditional_logit():
    # reference: statsmodels ConditionalLogit on the expanded per-user rows, one group per cell
    # (shared/references.md: stratified conditional MLE = conditional logistic regression)
    from statsmodels.discrete.conditional_models import ConditionalLogit

    n1, n0 = np.array([300, 250, 400]), np.array([280, 320, 150])
    x1, x0 = np.array([31, 12, 55]), np.array([20, 9, 14])
    c = CellTable(n1=n1, n0=n0, x1=x1, x0=x0, pair=np.zeros(3, dtype=int))
    psi, _ = conditional_mle(c, np.arange(3))
    y, x, g = [], [], []
    for k in range(3):
        for seen, n, conv in ((1, n1[k], x1[k]), (0, n0[k], x0[k])):
            y += [1] * conv + [0] * (n - conv)
            x += [seen] * n
            g += [k] * n
    res = ConditionalLogit(np.array(y), np.array(x, float)[:, None], groups=np.array(g)).fit(
        method="newton", disp=False, tol=1e-12, maxiter=100)
    assert psi == pytest.approx(float(res.params[0]), abs=1e-6)


def test_interpolant_matches_exact_curve_where_the_posterior_lies():
    # known truth: the exact curve (every stratum's whole support) at points between the nodes
    c = random_cells()
    cs = build_curves(c, 12)
    idx_all = np.flatnonzero(c.informative)
    for p in range(12):
        idx = idx_all[c.pair[idx_all] == p]
        sd = 1 / np.sqrt(cs.information[p])
        psi = cs.mode[p] + np.linspace(-6, 6, 241) * min(sd, 1.0)
        f, g, h = strata_moments(c, idx, np.broadcast_to(psi, (idx.size, psi.size)))
        v, d1, d2 = cs.evaluate(psi, np.full(psi.size, p), derivatives=True)
        np.testing.assert_allclose(v, f.sum(0), atol=2e-4)
        np.testing.assert_allclose(d1, g.sum(0), atol=5e-3 * max(1.0, np.sqrt(cs.information[p])))


def test_interpolant_pytensor_equals_numpy():
    import pytensor.tensor as pt

    from liftpool.models.conditional import curve_logp

    c = random_cells()
    cs = build_curves(c, 12)
    pairs = np.repeat(np.arange(12), 5)
    psi = RNG.normal(0, 3, pairs.size)
    x = pt.dvector("x")
    f = curve_logp(cs, x, pairs).eval({x: psi})
    np.testing.assert_allclose(f, cs.evaluate(psi, pairs), rtol=1e-12, atol=1e-9)


@pytest.mark.slow
def test_placebo_residual_quadrature_matches_brute_force_integral():
    # known truth: the residual integral by adaptive scipy quadrature of the same interpolated curve
    import pytensor.tensor as pt

    from liftpool.models.conditional_model import _placebo_marginal

    c = random_cells()
    cs = build_curves(c, 12)
    pairs = np.arange(12)
    for eta0, sr in ((0.0, 0.05), (0.3, 0.2), (-0.5, 0.6)):
        eta = np.full(12, eta0)
        e = pt.dvector("e")
        got = _placebo_marginal(cs, e, pt.as_tensor(sr), pairs).eval({e: eta})
        for p in pairs:
            # a dense trapezoid over +-40 residual sds (the peak can sit far out when the curve is steep)
            r = np.linspace(-40 * sr, 40 * sr, 400_001)
            lv = cs.evaluate(eta0 + r, np.full(r.size, p)) + stats.norm.logpdf(r, 0, sr)
            top = lv.max()
            ref = np.log(np.trapezoid(np.exp(lv - top), r)) + top
            assert got[p] == pytest.approx(ref, abs=1e-6), (p, eta0, sr)


def test_quick_gaussian_mode_runs_every_shape_through_the_same_structure():
    # known truth on invented counts: with rich data and no bias spread the quick mode recovers the lift
    from liftpool.models import ModelSettings, fit_counts

    rng = np.random.default_rng(3)
    rows = []
    true = {}
    for ci in range(6):
        lift = 0.1 + 0.05 * ci
        true[f"c{ci}"] = lift
        for o, role in ((0, "target"), (1, "placebo"), (2, "placebo")):
            eff = 0.2 + (lift if role == "target" else 0.0)
            for k in range(3):
                n1, n0 = 60_000, 60_000
                b = -3.0 + 0.2 * k
                rows += [(f"c{ci}", f"k{k}", "seen", f"o{ci}_{o}", role, n1,
                          rng.binomial(n1, 1 / (1 + np.exp(-(b + eff))))),
                         (f"c{ci}", f"k{k}", "unseen", f"o{ci}_{o}", role, n0, rng.binomial(n0, 1 / (1 + np.exp(-b))))]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    fit = fit_counts(counts, ModelSettings(seed=1, likelihood="conditional"), quick=True)
    t = fit.table("lift_logodds")
    covered = [(r.lower <= true[c] <= r.upper) for c, r in t.iterrows()]
    assert sum(covered) >= 5
    # one joint posterior: the stored bias and lift draws are those behind each other
    post = fit.idata.posterior
    tot = post["bias_target"] + post["lift_logodds"]
    assert np.isfinite(tot.values).all()
