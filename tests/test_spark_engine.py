"""The Spark engine (local mode) against the DuckDB engine: the same rules give the same counts.

The hand-built edge cases run on every engine in tests/test_counting_rules.py (Spark must give
the hand counts); here: the simulator's output, bad input, the command line and a workspace.
"""

from __future__ import annotations

import pandas as pd
import pytest

from liftpool.data_prep import CountingRules, prepare_counts
from liftpool.data_prep.errors import InputError
from tests.conftest import needs_spark, spark_for_tests

pytestmark = needs_spark
KEY = ["campaign", "cell", "arm", "outcome"]


def both(paths, rules, **kw):
    args = (paths["impressions"], paths["conversions"], paths["outcomes"])
    kw = {"users": paths.get("users"), "rules": rules, **kw}
    return (prepare_counts(*args, engine="spark", spark=spark_for_tests(), **kw),
            prepare_counts(*args, engine="duckdb", **kw))


@pytest.mark.parametrize("rules", [
    CountingRules(),                                                       # built-in cells
    CountingRules(covariates=("device", "age", "view_history"), numeric_bins=3),  # categorical + quantile bins
    CountingRules(covariates=(), unexposed=True, window_days=7),            # one cell, the unexposed arm
])
def test_simulator_counts_identical(small_scenario, rules):
    s, d = both(small_scenario, rules)
    pd.testing.assert_frame_equal(s.counts, d.counts)
    cols = list(d.summary.campaigns.columns)
    pd.testing.assert_frame_equal(s.summary.campaigns[cols].sort_values("campaign").reset_index(drop=True),
                                  d.summary.campaigns.sort_values("campaign").reset_index(drop=True),
                                  check_dtype=False)
    pd.testing.assert_frame_equal(s.summary.windows.sort_values(["campaign", "outcome"]).reset_index(drop=True),
                                  d.summary.windows.sort_values(["campaign", "outcome"]).reset_index(drop=True),
                                  check_dtype=False)
    assert {k: v for k, v in s.summary.totals.items()} == {k: v for k, v in d.summary.totals.items()}


def test_bad_timestamp_same_message_on_both_engines(tmp_path):
    imp = pd.DataFrame({"user_id": ["a", "b", "c"], "campaign": ["X"] * 3,
                        "served_at": ["2026-03-01T00:00:00Z", "yesterday", "2026-03-02T00:00:00Z"],
                        "viewable": [True, False, True]})
    conv = pd.DataFrame({"user_id": ["a"], "outcome": ["buy"], "converted_at": ["2026-03-03T00:00:00Z"]})
    out = pd.DataFrame({"campaign": ["X", "X"], "outcome": ["buy", "visit"], "role": ["target", "placebo"]})
    for name, df in (("impressions", imp), ("conversions", conv)):
        df.to_parquet(tmp_path / f"{name}.parquet", index=False)
    out.to_csv(tmp_path / "outcomes.csv", index=False)
    paths = {"impressions": tmp_path / "impressions.parquet", "conversions": tmp_path / "conversions.parquet",
             "outcomes": tmp_path / "outcomes.csv"}
    msgs = []
    for engine in ("spark", "duckdb"):
        with pytest.raises(InputError) as e:
            prepare_counts(*paths.values(), engine=engine, spark=spark_for_tests() if engine == "spark" else None)
        msgs.append(str(e.value))
    assert msgs[0] == msgs[1]
    assert "row 2" in msgs[0] and "'yesterday'" in msgs[0] and "served_at" in msgs[0]


def test_missing_file_is_an_input_error(tmp_path, small_scenario):
    with pytest.raises(InputError) as e:
        prepare_counts(tmp_path / "nope.parquet", small_scenario["conversions"], small_scenario["outcomes"],
                       engine="spark", spark=spark_for_tests())
    assert "file not found" in str(e.value) and "nope.parquet" in str(e.value)


def test_cli_prepare_engine_spark(small_scenario, tmp_path):
    from liftpool.cli import main

    p = small_scenario
    spark_for_tests()  # the command reuses the running session
    base = ["prepare", "--impressions", str(p["impressions"]), "--conversions", str(p["conversions"]),
            "--outcomes", str(p["outcomes"]), "--users", str(p["users"]), "-q"]
    assert main(base + ["--engine", "spark", "--spark-master", "local[2]", "--out", str(tmp_path / "s.parquet")]) == 0
    assert main(base + ["--out", str(tmp_path / "d.parquet")]) == 0
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "s.parquet"), pd.read_parquet(tmp_path / "d.parquet"))


def test_spark_workspace_prepare_and_add_placebo(small_scenario, tmp_path):
    from liftpool.cli import main
    from liftpool.workspace import Workspace

    p = small_scenario
    spark_for_tests()
    outs = pd.read_csv(p["outcomes"])
    first = outs[~((outs["role"] == "placebo") & (outs["outcome"] == "careers_page_visit"))]
    later = outs[(outs["role"] == "placebo") & (outs["outcome"] == "careers_page_visit")]
    first.to_csv(tmp_path / "first.csv", index=False)
    later.to_csv(tmp_path / "later.csv", index=False)
    ws_dir = tmp_path / "ws"
    assert main(["init", str(ws_dir), "--impressions", str(p["impressions"]), "--conversions", str(p["conversions"]),
                 "--outcomes", str(tmp_path / "first.csv"), "--users", str(p["users"]), "--engine", "spark",
                 "--spark-master", "local[2]", "-q"]) == 0
    ws = Workspace.open(ws_dir)
    assert ws.engine == "spark"
    assert main(["prepare", str(ws_dir), "-q"]) == 0
    assert main(["add-placebo", str(ws_dir), "--outcomes", str(tmp_path / "later.csv"), "-q"]) == 0
    # a Spark workspace has no local exposure cache: adding a placebo recounts, and equals a fresh DuckDB count
    got = Workspace.open(ws_dir).counts()
    ref = prepare_counts(p["impressions"], p["conversions"], pd.concat([first, later]), users=p["users"]).counts
    pd.testing.assert_frame_equal(got.sort_values(KEY).reset_index(drop=True),
                                  ref.sort_values(KEY).reset_index(drop=True))


def test_unknown_engine_in_workspace_config_lists_choices(tmp_path, small_scenario):
    from liftpool.data_prep.errors import ConfigError
    from liftpool.workspace import Workspace

    p = small_scenario
    with pytest.raises(ConfigError) as e:
        Workspace.init(tmp_path / "w", p["impressions"], [p["conversions"]], [p["outcomes"]],
                       prepare={"engine": "hadoop"})
    assert "'hadoop'" in str(e.value) and "duckdb" in str(e.value) and "spark" in str(e.value)
