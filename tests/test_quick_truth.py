"""Known-truth recovery of the quick mode on the demo simulator, several seeds (invented data: simulations)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from liftpool.data_prep import prepare_counts, simulate
from liftpool.models import fit_counts
from liftpool.models.calibration import leave_one_placebo_out

pytestmark = pytest.mark.slow  # many quick fits of simulated portfolios (CI runs it)

SEEDS = [101, 202, 303, 404]


@pytest.fixture(scope="module")
def runs():
    out = {}
    for zero in (False, True):
        for seed in SEEDS:
            data = simulate(seed=seed, scale=0.5, zero_lift=zero)
            res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"])
            out[(zero, seed)] = (res.counts, fit_counts(res.counts, quick=True), data["truth"].set_index("campaign"))
    return out


def test_quick_intervals_cover_truth(runs):
    cov, unc_err, cor_err = [], [], []
    for seed in SEEDS:
        _, fit, truth = runs[(False, seed)]
        lift = fit.table("lift")
        t = truth.loc[lift.index, "true_lift"]
        cov += list((lift["lower"] <= t) & (t <= lift["upper"]))
        unc_err += list(fit.table("lift_uncorrected")["median"] - t)
        cor_err += list(lift["median"] - t)
    assert np.mean(cov) >= 0.8, np.mean(cov)
    assert np.mean(unc_err) > 3 * np.mean(np.abs(cor_err))  # uncorrected is visibly biased upward


def test_quick_zero_lift_intervals_include_zero(runs):
    inc = []
    for seed in SEEDS:
        _, fit, _ = runs[(True, seed)]
        lift = fit.table("lift")
        inc += list((lift["lower"] <= 0) & (0 <= lift["upper"]))
    assert np.mean(inc) >= 0.8, np.mean(inc)


def test_leave_one_placebo_out_near_nominal(runs):
    loo = pd.concat([leave_one_placebo_out(runs[(False, s)][0], level=0.9, seed=s) for s in SEEDS])
    assert len(loo) >= 40
    # nominal 0.9; with ~50 placebos the binomial standard deviation is about 0.04
    assert 0.78 <= loo["covered"].mean() <= 1.0, loo["covered"].mean()
