"""The pooling step against outside references.

Sources (../shared/references.md):
* Eight Schools data, Rubin 1981; Gelman et al., Bayesian Data Analysis 3rd ed., Table 5.2.
* posteriordb ``eight_schools_noncentered`` reference posterior means
  (mu ~ N(0, 5), tau ~ HalfCauchy(5)); Monte Carlo standard errors 0.03-0.06.
* BDA3 section 5.5: complete pooling estimate 7.7, sd 4.1.
* arviz 0.23's bundled ``non_centered_eight`` draws (same model), compared within a few MCSE.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest

from liftpool.models import PoolingPrior, pool

Y = np.array([28, 8, -3, 7, -1, 1, 18, 12.0])
S = np.array([15, 10, 16, 11, 9, 11, 10, 18.0])
PRIOR = PoolingPrior(mu_loc=0.0, mu_scale=5.0, tau_scale=5.0, tau_family="halfcauchy")
# posteriordb reference means (../shared/references.md)
REF_MU, REF_TAU = 4.411, 3.602
REF_THETA = np.array([6.151, 4.940, 3.906, 4.796, 3.614, 4.051, 6.317, 4.884])


def test_eight_schools_exact_means_match_posteriordb():
    post = pool(Y, S, PRIOR, n_draws=10, seed=0)
    m = post.exact_means()
    # the grid means carry no Monte Carlo error; the reference carries 0.03-0.06: allow 3 x 0.06
    assert m["mu"] == pytest.approx(REF_MU, abs=0.18)
    assert m["tau"] == pytest.approx(REF_TAU, abs=0.18)
    np.testing.assert_allclose(m["theta"], REF_THETA, atol=0.18)


def test_eight_schools_draws_match_posteriordb_sd():
    post = pool(Y, S, PRIOR, n_draws=60_000, seed=1)
    # sd mu 3.309, tau 3.198 computed from the posteriordb draws (../shared/references.md)
    assert post.mu.std() == pytest.approx(3.309, rel=0.04)
    assert post.tau.std() == pytest.approx(3.198, rel=0.05)
    assert post.mu.mean() == pytest.approx(REF_MU, abs=0.1)
    assert post.tau.mean() == pytest.approx(REF_TAU, abs=0.1)


def test_eight_schools_matches_arviz_bundled_draws():
    # arviz 0.23 ships non_centered_eight locally (no download); other versions ship other draws
    ref = az.load_arviz_data("non_centered_eight")
    mcse = az.mcse(ref, var_names=["mu", "tau"])
    post = pool(Y, S, PRIOR, n_draws=10, seed=0).exact_means()
    for name in ("mu", "tau"):
        ref_mean = float(ref.posterior[name].mean())
        assert abs(post[name] - ref_mean) < 4 * float(mcse[name]) + 0.05, name


def test_complete_pooling_matches_bda3():
    # BDA3 section 5.5: with tau = 0 and a flat prior on mu, 7.7 (sd 4.1)
    post = pool(Y, S, PoolingPrior(mu_scale=np.inf), fixed_tau=0.0, n_draws=200_000, seed=2)
    assert post.mu.mean() == pytest.approx(7.7, abs=0.05)
    assert post.mu.std() == pytest.approx(4.1, abs=0.05)
    # and analytically: the precision-weighted mean (computed)
    w = 1 / S**2
    assert post.mu_mean[0] == pytest.approx((w * Y).sum() / w.sum(), rel=1e-12)


def test_no_pooling_limit_recovers_each_estimate():
    post = pool(Y, S, PoolingPrior(mu_scale=np.inf), fixed_tau=1e6, n_draws=100_000, seed=3)
    np.testing.assert_allclose(post.theta.mean(axis=0), Y, atol=0.2)


def test_bad_arguments():
    with pytest.raises(ValueError):
        pool([1.0, 2.0], [1.0])
    with pytest.raises(ValueError):
        pool([1.0], [0.0])
