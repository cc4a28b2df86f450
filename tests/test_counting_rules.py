"""The counting rules on a small hand-built log whose counts are worked out by hand.

Every expected number below is derived in the comments from the rows above it
(hand computation, no outside source needed: these are the documented rules).
"""

from __future__ import annotations

import pandas as pd
import pytest

from liftpool.data_prep import CountingRules, prepare_counts
from tests.conftest import needs_spark, spark_for_tests

T0 = pd.Timestamp("2026-03-01T00:00:00Z")


def iso(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y-%m-%dT%H:%M:%SZ")


H, D = pd.Timedelta(hours=1), pd.Timedelta(days=1)

IMPRESSIONS = pd.DataFrame(
    [  # user, campaign, served_at, viewable ('' = unmeasured)
        ("u1", "A", T0, "true"),
        ("u1", "A", T0 + 24 * H, "false"),
        ("u2", "A", T0, "false"),
        ("u2", "A", T0 + 2 * H, "false"),
        ("u3", "A", T0, ""),             # u3 has only an unmeasured impression: left out
        ("u4", "A", T0 + 48 * H, "false"),
        ("u4", "B", T0 + 24 * H, "true"),  # u4 is in two campaigns
        ("u4", "B", T0 + 30 * H, ""),
        ("u5", "B", T0, "false"),
        ("u6", "B", T0, "true"),
    ],
    columns=["user_id", "campaign", "served_at", "viewable"],
).assign(served_at=lambda d: d.served_at.map(iso))

CONVERSIONS = pd.DataFrame(
    [
        ("u1", "buy", T0),                    # exactly at the first serve: not counted
        ("u1", "buy", T0 + 3 * D),            # counted (A, seen)
        ("u1", "buy", T0 + 4 * D),            # second conversion of the same user: user counts once
        ("u2", "buy", T0 + 14 * D),           # exactly at the window's end: counted (A, unseen)
        ("u2", "visit", T0 + 14 * D + pd.Timedelta(seconds=1)),  # one second late: not counted
        ("u3", "buy", T0 + D),                # u3 left out
        ("u4", "visit", T0 + 50 * H),         # A (first 48h): unseen visit; B (first 24h): seen visit
        ("u5", "buy", T0 - H),                # before the first serve: not counted
        ("u6", "visit", T0 + 15 * D),         # after the window: not counted
        ("u6", "newsletter", T0 + D),         # an outcome no campaign lists: ignored
        ("u7", "buy", T0 + 5 * D),            # u7 was never served (only in the unexposed arm)
    ],
    columns=["user_id", "outcome", "converted_at"],
).assign(converted_at=lambda d: d.converted_at.map(iso))

# "visit" is A's placebo and B's target; "buy" is A's target and B's placebo.
OUTCOMES = pd.DataFrame([("A", "buy", "target"), ("A", "visit", "placebo"),
                         ("B", "visit", "target"), ("B", "buy", "placebo")],
                        columns=["campaign", "outcome", "role"])
USERS = pd.DataFrame({"user_id": [f"u{i}" for i in range(1, 9)], "device": ["d"] * 8})

# Hand counts with no covariates (one cell 'all'):
# A: seen {u1}; unseen {u2, u4}.  seen buy: u1 -> 1.  unseen buy: u2 (window end) -> 1.
#    unseen visit: u4 -> 1 (u2's visit is late).  seen visit: 0.
# B: seen {u4, u6}; unseen {u5}.  seen visit: u4 -> 1 (u6 late).  u5's buy is early -> 0.
EXPECTED = [
    ("A", "all", "seen", "buy", "target", 1, 1),
    ("A", "all", "seen", "visit", "placebo", 1, 0),
    ("A", "all", "unseen", "buy", "target", 2, 1),
    ("A", "all", "unseen", "visit", "placebo", 2, 1),
    ("B", "all", "seen", "buy", "placebo", 2, 0),
    ("B", "all", "seen", "visit", "target", 2, 1),
    ("B", "all", "unseen", "buy", "placebo", 1, 0),
    ("B", "all", "unseen", "visit", "target", 1, 0),
]
COLS = ["campaign", "cell", "arm", "outcome", "role", "users", "conversions"]
NO_CELLS = CountingRules(covariates=(), min_cell_users=1)


def measurement_version(imp: pd.DataFrame) -> pd.DataFrame:
    """The same log written with measurement columns instead of a viewable flag."""
    s50 = imp["viewable"].map({"true": 1.5, "false": 0.5, "": None})
    return pd.DataFrame({"user_id": imp.user_id, "campaign": imp.campaign, "served_at": imp.served_at,
                         "ad_format": "display", "ad_width": 300, "ad_height": 250,
                         "seconds_in_view_50": s50, "seconds_in_view_30": s50})


def run(engine, imp=IMPRESSIONS, rules=NO_CELLS, **kw):
    if engine == "spark":
        kw["spark"] = spark_for_tests()
    return prepare_counts(imp, CONVERSIONS, OUTCOMES, rules=rules, engine=engine, **kw)


#: every engine: the Spark engine runs the DuckDB engine's SQL (transpiled), so it must give the hand counts too
ENGINES = ["duckdb", "pandas", pytest.param("spark", marks=needs_spark)]


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("form", ["viewable", "measurement"])
def test_hand_counts(engine, form):
    imp = IMPRESSIONS if form == "viewable" else measurement_version(IMPRESSIONS)
    res = run(engine, imp)
    assert res.counts.values.tolist() == [list(r) for r in EXPECTED]


@pytest.mark.parametrize("engine", ENGINES)
def test_hand_summary(engine):
    s = run(engine).summary
    c = s.campaigns.set_index("campaign")
    # A: 6 impressions, 5 measured, 1 viewable, 4 users served, u3 only unmeasured
    assert c.loc["A", ["impressions", "measured_impressions", "viewable_impressions", "users_served",
                       "users_unmeasured_only"]].tolist() == [6, 5, 1, 4, 1]
    assert c.loc["B", ["impressions", "measured_impressions", "viewable_impressions", "users_served",
                       "users_unmeasured_only"]].tolist() == [4, 3, 2, 3, 0]
    assert c.loc["A", "nonviewable_share"] == pytest.approx(4 / 5)
    assert c.loc["B", "nonviewable_share"] == pytest.approx(1 / 3)
    w = s.windows.set_index(["campaign", "outcome"])
    cols = ["before_first_serve", "in_window", "after_window"]
    assert w.loc[("A", "buy"), cols].tolist() == [1, 3, 0]    # u1 at T0; u1 x2 and u2; u3 left out
    assert w.loc[("A", "visit"), cols].tolist() == [0, 1, 1]  # u4 inside; u2 one second late
    assert w.loc[("B", "visit"), cols].tolist() == [0, 1, 1]  # u4 inside; u6 late
    assert w.loc[("B", "buy"), cols].tolist() == [1, 0, 0]    # u5 early
    assert s.totals["conversion_rows_unknown_outcome"] == 1
    assert s.totals["users_unmeasured_only"] == 1


@pytest.mark.parametrize("engine", ENGINES)
def test_builtin_covariate_cells(engine):
    # frequency and view history (hand):
    # A: u1 freq 2, history unknown (no other campaign), seen;  u2 freq 2, unknown, unseen;
    #    u4 freq 1, history on B = 1 viewable of 1 measured = 1.0 -> bin 0.75-1, unseen (no seen partner: dropped)
    # B: u4 freq 2, history on A = 0 of 1 -> 0-0.25, seen (no unseen partner: dropped);
    #    u5 freq 1 unknown unseen; u6 freq 1 unknown seen
    res = run(engine, rules=CountingRules(min_cell_users=1))
    cells = res.counts.drop_duplicates(["campaign", "cell", "arm"])[["campaign", "cell", "arm", "users"]]
    assert cells.values.tolist() == [
        ["A", "frequency=2; view_history=unknown", "seen", 1],
        ["A", "frequency=2; view_history=unknown", "unseen", 1],
        ["B", "frequency=1; view_history=unknown", "seen", 1],
        ["B", "frequency=1; view_history=unknown", "unseen", 1],
    ]
    c = res.summary.campaigns.set_index("campaign")
    assert c.loc["A", "users_one_arm_cells"] == 1 and c.loc["B", "users_one_arm_cells"] == 1


@pytest.mark.parametrize("engine", ENGINES)
def test_small_cells_merge_and_drop(engine):
    # With min_cell_users=2 both kept cells above (1 seen, 1 unseen) are small.
    merged = run(engine, rules=CountingRules(min_cell_users=2))
    assert set(merged.counts.cell) == {"(merged small cells)"}
    assert merged.summary.totals["users_small_cells_merged"] == 4
    dropped = run(engine, rules=CountingRules(min_cell_users=2, small_cells="drop"))
    assert dropped.counts.empty
    assert dropped.summary.totals["users_small_cells_dropped"] == 4


@pytest.mark.parametrize("engine", ENGINES)
def test_unexposed_arm(engine):
    # users table u1..u8.  A served u1..u4 (u3 unmeasured but served): unexposed {u5..u8} = 4.
    #   A's first serve T0, window (T0, T0+14d]: u7 buy at T0+5d -> 1; u6's visit is late -> 0.
    # B served u4..u6: unexposed {u1, u2, u3, u7, u8} = 5.  buy in (T0, T0+14d]: u1 (T0+3d), u2 (T0+14d),
    #   u3 (T0+1d), u7 (T0+5d) -> 4.  visit: u2's is one second late -> 0.
    res = run(engine, users=USERS, rules=CountingRules(covariates=(), min_cell_users=1, unexposed=True))
    un = res.counts[res.counts.arm == "unexposed"][["campaign", "outcome", "users", "conversions"]]
    assert un.values.tolist() == [["A", "buy", 4, 1], ["A", "visit", 4, 0], ["B", "buy", 5, 4], ["B", "visit", 5, 0]]


def test_window_setting():
    # A 3-day window: u2's buy at T0+14d is now late; u1's at T0+3d is exactly at the end (counted)
    res = run("duckdb", rules=CountingRules(covariates=(), min_cell_users=1, window_days=3))
    got = res.counts.set_index(["campaign", "arm", "outcome"])["conversions"]
    assert got[("A", "seen", "buy")] == 1
    assert got[("A", "unseen", "buy")] == 0


def test_no_user_identifier_leaves_the_layer():
    res = run("duckdb", users=USERS, rules=CountingRules(covariates=("device",), min_cell_users=1))
    assert list(res.counts.columns) == COLS
    text = res.counts.to_csv() + str(res.summary.to_dict())
    assert "u1" not in text and "u7" not in text


def test_dataset_has_named_dimensions():
    ds = run("duckdb").dataset
    assert set(ds.users.dims) == {"campaign", "cell", "arm", "outcome"}
    assert float(ds.conversions.sel(campaign="B", cell="all", arm="seen", outcome="visit")) == 1.0
    assert str(ds.role.sel(campaign="A", outcome="visit").item()) == "placebo"


@pytest.mark.parametrize("engine", ENGINES)
def test_nan_seconds_mean_unmeasured(engine, tmp_path):
    # pyarrow keeps numpy's NaN in a float column (pandas' to_parquet would write null); NaN seconds
    # mean "not measured", like an empty cell.  Hand: a (1.5 s: viewable), b (NaN: unmeasured only),
    # c (0.5 s: measured, not viewable).  DuckDB 2.0 hid such NaN behind Parquet statistics: a
    # regression test for both engines.
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    s = np.array([1.5, np.nan, 0.5])
    pq.write_table(pa.table({"user_id": ["a", "b", "c"], "campaign": ["X"] * 3,
                             "served_at": [iso(T0)] * 3, "ad_format": ["display"] * 3, "ad_width": [300] * 3,
                             "ad_height": [250] * 3, "seconds_in_view_50": pa.array(s),
                             "seconds_in_view_30": pa.array(s)}), tmp_path / "imp.parquet")
    conv = pd.DataFrame({"user_id": ["a", "b"], "outcome": ["buy", "buy"], "converted_at": [iso(T0 + D)] * 2})
    out = pd.DataFrame({"campaign": ["X", "X"], "outcome": ["buy", "visit"], "role": ["target", "placebo"]})
    kw = {"spark": spark_for_tests()} if engine == "spark" else {}
    res = prepare_counts(tmp_path / "imp.parquet", conv, out, rules=NO_CELLS, engine=engine, **kw)
    got = res.counts.set_index(["arm", "outcome"])[["users", "conversions"]]
    assert got.loc[("seen", "buy")].tolist() == [1, 1]
    assert got.loc[("unseen", "buy")].tolist() == [1, 0]
    c = res.summary.campaigns.iloc[0]
    assert (c["users_unmeasured_only"], c["measured_impressions"]) == (1, 2)
