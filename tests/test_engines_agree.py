"""The DuckDB and pandas engines give identical counts on simulator output (invented data)."""

from __future__ import annotations

import pandas as pd
import pytest

from liftpool.data_prep import CountingRules, prepare_counts
from liftpool.data_prep.engine_pandas import count_pandas, typed_frames
from liftpool.data_prep.engine_sql import build_exposures, count_sql
from liftpool.data_prep.sources import open_inputs


@pytest.mark.parametrize("covariates", [("frequency", "view_history"), ("device", "age", "view_history"), ()])
def test_engines_identical_on_simulator(small_scenario, covariates):
    p = small_scenario
    rules = CountingRules(covariates=covariates, unexposed=True)
    users_covs = tuple(c for c in covariates if c not in ("frequency", "view_history"))
    inputs = open_inputs(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], covariates=users_covs)
    build_exposures(inputs, rules)
    a = count_sql(inputs, rules).normalized()
    b = count_pandas(typed_frames(inputs), rules, False, inputs.numeric_covariates).normalized()
    pd.testing.assert_frame_equal(a.users, b.users)
    pd.testing.assert_frame_equal(a.conversions, b.conversions)
    pd.testing.assert_frame_equal(a.windows, b.windows)
    pd.testing.assert_frame_equal(a.campaigns, b.campaigns)
    assert a.totals == b.totals
    full_a = prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], rules=rules)
    full_b = prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], rules=rules,
                            engine="pandas")
    pd.testing.assert_frame_equal(full_a.counts, full_b.counts)
    assert len(full_a.counts) > 50


def test_simulator_is_realistic(small_scenario):
    """The scenario's documented properties hold (invented data, checked against its own design)."""
    p = small_scenario
    res = prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"],
                         rules=CountingRules(unexposed=True))
    camp = res.summary.campaigns.set_index("campaign")
    share = 1 - camp.viewable_impressions.sum() / camp.measured_impressions.sum()
    assert 0.4 < share < 0.6  # about half of measured impressions not viewable (common practice, no source)
    assert (camp.target_conversions_seen + camp.target_conversions_unseen).min() < 100
    sizes = camp.users_seen + camp.users_unseen
    assert sizes.max() / sizes.min() > 30  # sizes vary widely
    c = res.counts
    tgt = c[c.role == "target"].groupby(["campaign", "arm"])[["users", "conversions"]].sum()
    rate = tgt.conversions / tgt.users
    big = "spring-planters"
    exposed = (tgt.loc[(big, "seen"), "conversions"] + tgt.loc[(big, "unseen"), "conversions"]) / (
        tgt.loc[(big, "seen"), "users"] + tgt.loc[(big, "unseen"), "users"])
    assert exposed / rate[(big, "unexposed")] > 2.5  # targeting inflates the naive comparison
    pl = c[c.role == "placebo"].groupby("arm")[["users", "conversions"]].sum()
    pr = pl.conversions / pl.users
    assert pr["seen"] > 1.1 * pr["unseen"]  # placebos carry the browsing bias


def test_simulator_is_seeded():
    from liftpool.data_prep import simulate

    a, b = simulate(seed=3, scale=0.01), simulate(seed=3, scale=0.01)
    pd.testing.assert_frame_equal(a["impressions"], b["impressions"])
    c = simulate(seed=4, scale=0.01)
    assert not a["impressions"].equals(c["impressions"])
