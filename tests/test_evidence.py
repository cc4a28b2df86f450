"""Randomized tests in the model: the normal update, the quick mode's marginal likelihood with tests and
the excess bias (against a dense multivariate normal), and known truth where the target's bias differs
from its placebos' (simulations, data_prep/shapes.py)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from liftpool.data_prep.experiments import check_experiments
from liftpool.data_prep.shapes import scaled, shape_counts, shape_experiments
from liftpool.models import ModelSettings, fit_counts
from liftpool.models.evidence import CampaignTests, evidence_loglik, lift_given_tests, normal_update
from liftpool.models.gaussian import _campaign_terms, _marginal


def test_normal_update_against_numerical_integration():
    # reference: the posterior of N(0.1, 0.2^2) prior times N(y=0.3 | lift, 0.1^2), by scipy quadrature
    prior, like = stats.norm(0.1, 0.2), stats.norm(0.0, 0.1)

    def dens(x):
        return prior.pdf(x) * like.pdf(0.3 - x)

    z = integrate.quad(dens, -3, 3)[0]
    mean = integrate.quad(lambda x: x * dens(x), -3, 3)[0] / z
    var = integrate.quad(lambda x: (x - mean) ** 2 * dens(x), -3, 3)[0] / z
    m, v = normal_update(0.1, 0.2**2, 0.3, 0.1**2)
    assert m == pytest.approx(mean, abs=1e-9) and v == pytest.approx(var, abs=1e-9)


def test_untested_campaigns_keep_their_prior_and_the_test_density():
    t = CampaignTests(np.array([1.0, 0.0]), np.array([0.2, 0.0]), np.array([0.01, 1.0]))
    m, v = lift_given_tests(np.array([0.1, 0.1]), np.array([0.2, 0.2]), t)
    assert m[1] == 0.1 and v[1] == pytest.approx(0.04) and v[0] < 0.01
    # reference: scipy.stats.norm.logpdf of the test's marginal N(centre, sqrt(spread^2 + se^2))
    ll = evidence_loglik(np.array([0.1, 0.1]), np.array([0.2, 0.2]), t)
    assert ll == pytest.approx(stats.norm.logpdf(0.2, 0.1, np.sqrt(0.04 + 0.01)))


def _dense_logml(y_pl, v_pl, camp_pl, yt, st2, ty, tse2, has_x, sb, sr, sl, se, prior_sd):
    """log N(all observations) with the three means and every campaign effect integrated: a dense covariance."""
    C = yt.size
    rows = []  # (value, coefficients on bias_mean, lift_mean, excess_mean, the campaign, kind)
    for y, c in zip(y_pl, camp_pl, strict=True):
        rows.append((y, (1, 0, 0), c, "placebo"))
    for c in range(C):
        rows.append((yt[c], (1, 1, 1), c, "target"))
    for c in np.flatnonzero(has_x):
        rows.append((ty[c], (0, 1, 0), c, "test"))
    n = len(rows)
    H = np.array([r[1] for r in rows], float)
    cov = H @ np.diag(np.asarray(prior_sd, float) ** 2) @ H.T
    for i, (_, _, ci, ki) in enumerate(rows):
        for j, (_, _, cj, kj) in enumerate(rows):
            if ci != cj:
                continue
            b = sb**2 if ki != "test" and kj != "test" else 0.0  # shared campaign bias
            lift = sl**2 if ki != "placebo" and kj != "placebo" else 0.0  # shared campaign lift
            cov[i, j] += b + lift
            if i == j:
                cov[i, j] += {"placebo": v_pl[i] + sr**2 if ki == "placebo" else 0.0,
                              "target": st2[ci] + sr**2 + se**2, "test": tse2[ci]}[ki]
    y = np.array([r[0] for r in rows])
    return stats.multivariate_normal(np.zeros(n), cov).logpdf(y), n


def test_quick_marginal_with_tests_and_excess_matches_a_dense_normal():
    # reference: scipy.stats.multivariate_normal on the full observation vector, means and campaign
    # effects integrated by their covariance; differences between two spread settings cancel constants
    rng = np.random.default_rng(4)
    C = 3
    camp_pl = np.array([0, 0, 1, 2, 2])
    y_pl, v_pl = rng.normal(0.2, 0.1, 5), rng.uniform(0.005, 0.02, 5)
    yt, st2 = rng.normal(0.5, 0.1, C), rng.uniform(0.005, 0.02, C)
    t = CampaignTests(np.array([1.0, 0.0, 1.0]), np.array([0.15, 0.0, 0.25]), np.array([0.003, 1.0, 0.004]))
    prior_sd = np.array([0.5, 0.5, 0.25])
    out = []
    for sb, sr, sl, se in ((0.1, 0.05, 0.1, 0.08), (0.2, 0.1, 0.05, 0.02)):
        terms = _campaign_terms(y_pl, v_pl, camp_pl, C, yt, st2, np.ones(C, bool), sr**2, sl**2, se**2, t)
        lm, _, _, _ = _marginal(terms, sb**2, 1.0 / prior_sd**2)
        dense, n = _dense_logml(y_pl, v_pl, camp_pl, yt, st2, t.y, t.se2, t.has > 0, sb, sr, sl, se, prior_sd)
        out.append((float(lm), dense))
    assert out[0][0] - out[1][0] == pytest.approx(out[0][1] - out[1][1], abs=1e-8)


def _coverage(fit, truth) -> float:
    t = fit.table("lift_logodds")
    tr = truth.set_index("campaign")["lift_logodds"].reindex(t.index)
    return float(((t["lower"] <= tr) & (tr <= t["upper"])).mean())


EXCESS = scaled("few_cells", campaigns=12, excess_mean=0.2, excess_sd=0.03, tested=5, test_se=0.04)


@pytest.mark.parametrize("seed", [1, 2])
def test_quick_mode_recovers_the_excess_and_restores_coverage(seed):
    # known truth (invented data, a simulation): every target's bias exceeds its placebos' by about 0.2
    counts, truth = shape_counts(EXCESS, seed)
    tests = check_experiments(shape_experiments(EXCESS, truth, seed), campaigns=list(truth.campaign))
    without = fit_counts(counts, ModelSettings(), quick=True)
    with_tests = fit_counts(counts, ModelSettings(), quick=True, experiments=tests)
    em = with_tests.idata.posterior["excess_mean"].values.ravel()
    lo, hi = np.quantile(em, [0.05, 0.95])
    assert lo < 0.2 < hi and lo > 0.0  # recovered, and told apart from zero
    assert _coverage(without, truth) <= 0.5  # without the tests the intervals miss the shifted lifts
    assert _coverage(with_tests, truth) >= 0.8  # with them, near nominal (90%) on 12 campaigns
    assert "excess_mean" not in without.idata.posterior  # no tests: the excess is fixed at 0 (today's model)


def test_excess_switches():
    counts, truth = shape_counts(scaled("few_cells", campaigns=5, tested=2), 3)
    tests = check_experiments(shape_experiments(scaled("few_cells", tested=2), truth, 3), campaigns=list(truth.campaign))
    off = fit_counts(counts, ModelSettings(excess_bias="off"), quick=True, experiments=tests)
    assert "excess_mean" not in off.idata.posterior and off.info["tests"] == 2
    on = fit_counts(counts, ModelSettings(excess_bias="on"), quick=True)
    assert "excess_sd" in on.idata.posterior and on.info["tests"] == 0
    # "on" without tests only widens: the prior of the excess adds to every interval
    base = fit_counts(counts, ModelSettings(), quick=True)
    w = lambda f: (f.table("lift_logodds")["upper"] - f.table("lift_logodds")["lower"]).mean()  # noqa: E731
    assert w(on) > w(base)


@pytest.mark.slow
def test_full_model_recovers_the_excess_and_converges():
    # the default full fit on the same known truth (smaller: 8 campaigns, 4 tested)
    sh = scaled(EXCESS, campaigns=8, tested=4)
    counts, truth = shape_counts(sh, 5)
    tests = check_experiments(shape_experiments(sh, truth, 5), campaigns=list(truth.campaign))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_counts(counts, ModelSettings(), experiments=tests)
    assert fit.converged, fit.diagnostics.render()
    em = fit.idata.posterior["excess_mean"].values.ravel()
    lo, hi = np.quantile(em, [0.05, 0.95])
    assert lo < 0.2 < hi and lo > 0.0
    # without the tests (the quick mode, to keep CI short; it matches the full model on these data) the
    # intervals miss; with them the full model's cover
    plain = fit_counts(counts, ModelSettings(), quick=True)
    assert _coverage(fit, truth) >= 0.75 and _coverage(plain, truth) <= 0.5
    # the full model and the quick mode agree on the excess (medians within 0.03 log odds)
    q = fit_counts(counts, ModelSettings(), quick=True, experiments=tests)
    assert abs(np.median(em) - np.median(q.idata.posterior["excess_mean"].values)) < 0.03
    # the held-out check predicted each test from the rest
    h = fit.heldout[fit.heldout["kind"] == "test"]
    assert len(h) == 4 and h["covered"].mean() >= 0.75


def test_tests_are_refused_where_the_model_cannot_use_them():
    from liftpool.data_prep.errors import ConfigError, InputError

    counts, truth = shape_counts(scaled("few_cells", campaigns=3), 2)
    tests = check_experiments(pd.DataFrame({"campaign": ["camp0"], "estimate": [0.1], "std_error": [0.05],
                                            "measures": ["exposed"]}))
    with pytest.raises(ConfigError, match="conditional likelihood"):
        fit_counts(counts, ModelSettings(likelihood="binomial"), quick=True, experiments=tests)
    no_pl = counts[counts["role"] == "target"]
    with pytest.raises(InputError, match="no campaign has a placebo"):
        fit_counts(no_pl, ModelSettings(), quick=True, experiments=tests)
    other = tests.assign(campaign="elsewhere")
    with pytest.raises(InputError, match="not in the counts"):
        fit_counts(counts, ModelSettings(), quick=True, experiments=other)
