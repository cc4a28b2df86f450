"""The quick mode's stratified estimator and bias distribution against outside references.

Sources (../shared/references.md):
* UC Berkeley admissions, 6 departments: Mantel-Haenszel common odds ratio 0.9046968,
  95% CI 0.7719074-1.0603298 (R mantelhaen.test); statsmodels StratifiedTable reproduces it.
  Crude odds ratio 1.841 (computed).
* Schuemie et al. 2014, Statistics in Medicine 33(2): negative-control estimates
  theta_i ~ N(mu, sigma^2 + s_i^2), (mu, sigma) by maximum likelihood.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats
from statsmodels.stats.contingency_tables import StratifiedTable

from liftpool.models import ModelSettings, make_design, mantel_haenszel, stratified_estimates
from liftpool.models.quick import quick_fit

# rows male/female, columns admitted/rejected
BERKELEY = {"A": [[512, 313], [89, 19]], "B": [[353, 207], [17, 8]], "C": [[120, 205], [202, 391]],
            "D": [[138, 279], [131, 244]], "E": [[53, 138], [94, 299]], "F": [[22, 351], [24, 317]]}


def _abcd(tables):
    t = np.array(list(tables.values()), dtype=float)
    return t[:, 0, 0], t[:, 0, 1], t[:, 1, 0], t[:, 1, 1]


def test_berkeley_mantel_haenszel_matches_r():
    lo, se = mantel_haenszel(*_abcd(BERKELEY))
    z = stats.norm.ppf(0.975)
    assert np.exp(lo) == pytest.approx(0.9046968, rel=1e-6)  # R mantelhaen.test
    assert np.exp(lo - z * se) == pytest.approx(0.7719074, rel=1e-5)
    assert np.exp(lo + z * se) == pytest.approx(1.0603298, rel=1e-5)
    a, b, c, d = (x.sum() for x in _abcd(BERKELEY))
    assert a * d / (b * c) == pytest.approx(1.841, abs=0.001)  # crude OR reverses the picture (computed)


def test_mantel_haenszel_matches_statsmodels_on_random_tables():
    rng = np.random.default_rng(0)
    for _ in range(20):
        k = rng.integers(2, 8)
        tables = rng.integers(1, 300, size=(k, 2, 2))
        st = StratifiedTable([t.astype(float) for t in tables])
        lo, se = mantel_haenszel(tables[:, 0, 0], tables[:, 0, 1], tables[:, 1, 0], tables[:, 1, 1])
        assert lo == pytest.approx(st.logodds_pooled, rel=1e-10)
        assert se == pytest.approx(st.logodds_pooled_se, rel=1e-10)


def _counts_from_tables(campaign, outcome, role, tables):
    rows = []
    for k, (x_s, n_s, x_u, n_u) in enumerate(tables):
        rows.append((campaign, f"c{k}", "seen", outcome, role, n_s, x_s))
        rows.append((campaign, f"c{k}", "unseen", outcome, role, n_u, x_u))
    return rows


def test_cell_adjusted_log_odds_ratio_is_mantel_haenszel():
    # seen = male (exposed), conversion = admitted: the counts path gives the statsmodels estimate
    tables = [(t[0][0], t[0][0] + t[0][1], t[1][0], t[1][0] + t[1][1]) for t in BERKELEY.values()]
    rows = _counts_from_tables("dept", "admit", "target", tables)
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    est = stratified_estimates(counts)
    st = StratifiedTable([np.array(t, dtype=float) for t in BERKELEY.values()])
    assert est["log_or"].iloc[0] == pytest.approx(st.logodds_pooled, rel=1e-10)
    assert est["se"].iloc[0] == pytest.approx(st.logodds_pooled_se, rel=1e-10)


def schuemie_ml(theta, s):
    """Maximum-likelihood systematic-error distribution (Schuemie et al. 2014), written here independently."""
    def nll(p):
        mu, log_sigma = p
        return -stats.norm.logpdf(theta, mu, np.sqrt(np.exp(2 * log_sigma) + s**2)).sum()

    r = optimize.minimize(nll, x0=[0.0, np.log(0.1)], method="Nelder-Mead", options={"xatol": 1e-8, "fatol": 1e-10})
    return r.x[0], float(np.exp(r.x[1]))


def test_bias_distribution_agrees_with_schuemie_ml():
    # placebo-only data: 40 placebo outcomes over 10 campaigns with a known bias distribution
    rng = np.random.default_rng(11)
    rows = []
    for c in range(10):
        camp = f"camp{c}"
        # a target with a tiny cell so the campaign is valid; the placebos carry the information
        rows += _counts_from_tables(camp, "t", "target", [(5, 500, 5, 500)])
        for o in range(4):
            b = rng.normal(0.2, 0.15)
            tabs = []
            for _k in range(3):
                n_s, n_u = 20_000, 20_000
                p_u = 0.03
                p_s = 1 / (1 + np.exp(-(np.log(p_u / (1 - p_u)) + b)))
                tabs.append((rng.binomial(n_s, p_s), n_s, rng.binomial(n_u, p_u), n_u))
            rows += _counts_from_tables(camp, f"p{o}", "placebo", tabs)
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    d = make_design(counts)
    est = stratified_estimates(d.counts)
    pl = est[est.role == "placebo"]
    mu_ml, sigma_ml = schuemie_ml(pl.log_or.to_numpy(), pl.se.to_numpy())
    r = quick_fit(d, ModelSettings(seed=3), n_draws=20_000)
    # weakly informative priors, 40 placebos: the posterior medians sit near the ML fit
    assert np.median(r.bias_mean) == pytest.approx(mu_ml, abs=0.03)
    assert np.median(r.bias_sd) == pytest.approx(sigma_ml, abs=0.04)
    assert 0.1 < sigma_ml < 0.2 and 0.1 < mu_ml < 0.3  # and ML itself recovers the simulated truth
