"""Property tests (hypothesis) of the counting rules on random small logs."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from liftpool.data_prep import CountingRules, prepare_counts

pytestmark = pytest.mark.slow  # many preparations of random logs, three engines (CI runs it)

T0 = pd.Timestamp("2026-03-01T00:00:00Z")
RULES = CountingRules(covariates=("frequency",), min_cell_users=1)


@st.composite
def logs(draw):
    n_users = draw(st.integers(2, 12))
    camps = ["A", "B", "C"][: draw(st.integers(1, 3))]
    rows = []
    for u in range(n_users):
        for c in camps:
            for _ in range(draw(st.integers(0, 3))):
                hours = draw(st.integers(0, 24 * 20))
                view = draw(st.sampled_from(["true", "false", ""]))
                rows.append((f"u{u}", c, T0 + pd.Timedelta(hours=hours), view))
    if not rows:
        rows.append(("u0", camps[0], T0, "true"))
    imp = pd.DataFrame(rows, columns=["user_id", "campaign", "served_at", "viewable"])
    used = sorted(imp.campaign.unique())
    conv = []
    for u in range(n_users):
        for o in ("buy", "visit"):
            for _ in range(draw(st.integers(0, 2))):
                conv.append((f"u{u}", o, T0 + pd.Timedelta(hours=draw(st.integers(-48, 24 * 40)))))
    conv = pd.DataFrame(conv or [("u0", "buy", T0)], columns=["user_id", "outcome", "converted_at"])
    out = pd.DataFrame([(c, "buy", "target") for c in used] + [(c, "visit", "placebo") for c in used],
                       columns=["campaign", "outcome", "role"])
    return imp, conv, out


def _iso(df, col):
    return df.assign(**{col: df[col].dt.strftime("%Y-%m-%dT%H:%M:%SZ")})


def prep(imp, conv, out, engine="duckdb"):
    return prepare_counts(_iso(imp, "served_at"), _iso(conv, "converted_at"), out, rules=RULES, engine=engine)


def exposed_users(imp):
    m = imp[imp.viewable != ""]
    return m.groupby("campaign").user_id.nunique()


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(logs())
def test_seen_plus_unseen_equals_exposed_before_cell_rules(data):
    imp, conv, out = data
    res = prep(imp, conv, out)
    c = res.summary.campaigns.set_index("campaign")
    kept = c.users_seen + c.users_unseen + c.users_one_arm_cells + c.users_small_cells_dropped
    want = exposed_users(imp).reindex(c.index).fillna(0).astype(int)
    assert (kept == want).all()
    assert (c.users_served - c.users_unmeasured_only == want).all()


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(logs(), st.integers(0, 2**31 - 1))
def test_row_order_does_not_matter_and_engines_agree(data, seed):
    imp, conv, out = data
    a = prep(imp, conv, out).counts
    rng = np.random.default_rng(seed)
    shuffled = prep(imp.iloc[rng.permutation(len(imp))], conv.iloc[rng.permutation(len(conv))],
                    out.iloc[rng.permutation(len(out))]).counts
    pd.testing.assert_frame_equal(a, shuffled)
    pd.testing.assert_frame_equal(a, prep(imp, conv, out, engine="pandas").counts)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(logs(), st.integers(1, 5))
def test_unrelated_campaign_changes_nothing_else(data, n_new):
    imp, conv, out = data
    before = prep(imp, conv, out).counts
    new_imp = pd.DataFrame({"user_id": [f"new{i}" for i in range(n_new)], "campaign": "Z",
                            "served_at": T0, "viewable": (["true", "false"] * n_new)[:n_new]})
    new_conv = pd.DataFrame({"user_id": [f"new{i}" for i in range(n_new)], "outcome": "zbuy",
                             "converted_at": T0 + pd.Timedelta(days=1)})
    new_out = pd.DataFrame([("Z", "zbuy", "target"), ("Z", "visit", "placebo")], columns=out.columns)
    after = prep(pd.concat([imp, new_imp]), pd.concat([conv, new_conv]), pd.concat([out, new_out])).counts
    pd.testing.assert_frame_equal(before, after[after.campaign != "Z"].reset_index(drop=True))
