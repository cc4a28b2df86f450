"""Simulation-based calibration of the quick mode's pooling step (Talts et al. 2018, arXiv:1804.06788):
the rank of each prior draw among its posterior draws is uniform over replications."""

from __future__ import annotations

import numpy as np

from liftpool.models.calibration import rank_uniformity, sbc_pooling


def test_sbc_pooling_ranks_are_uniform():
    ranks = sbc_pooling(n_reps=400, n_draws=99, seed=12)
    for col in ("rank_mu", "rank_tau", "rank_theta0"):
        p = rank_uniformity(ranks[col].to_numpy(), 99)
        assert p > 0.01, (col, p)


def test_sbc_detects_a_miscalibrated_posterior():
    # the check can fail: ranks from a posterior that is too narrow pile up at the ends
    rng = np.random.default_rng(0)
    truth = rng.normal(size=400)
    post = truth[:, None] + rng.normal(0.0, 1.0, size=(400, 1)) + 0.3 * rng.normal(size=(400, 99))
    ranks = (post < truth[:, None]).sum(axis=1)
    assert rank_uniformity(ranks, 99) < 1e-6
