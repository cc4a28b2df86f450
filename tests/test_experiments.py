"""Randomized tests as input: Bloom's conversion, the log scale, and refusals (exit 2, one clear message)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats.contingency import odds_ratio

from liftpool.data_prep.errors import InputError
from liftpool.data_prep.experiments import MEASURES, check_experiments, read_experiments


def _tests(**cols):
    base = {"campaign": ["a"], "estimate": [0.05], "std_error": [0.02], "measures": ["assigned"],
            "exposed_share": [0.5]}
    base.update(cols)
    return pd.DataFrame(base)


def test_bloom_conversion_of_an_assigned_test():
    # Bloom 1984 (Evaluation Review 8(2)), ../shared/references.md: effect among the exposed =
    # intent-to-treat effect / exposed share; its standard error scales the same way (share known)
    t = check_experiments(_tests(), campaigns=["a"])
    r = t.iloc[0]
    assert r["lift"] == pytest.approx(0.05 / 0.5)
    assert r["lift_se"] == pytest.approx(0.02 / 0.5)
    assert r["log_lift"] == pytest.approx(np.log(1.1))
    assert r["log_lift_se"] == pytest.approx(0.04 / 1.1)  # delta method: d log(1 + x) = dx / (1 + x)
    assert r["test"] == "a test 1"


def test_exposed_test_is_taken_as_it_is():
    t = check_experiments(_tests(measures=["exposed"], exposed_share=[np.nan]), campaigns=["a"])
    assert t.iloc[0]["lift"] == pytest.approx(0.05) and t.iloc[0]["exposed_share"] == 1.0


def test_log_lift_is_close_to_the_log_odds_ratio_at_low_rates():
    # the model's scale is the log odds ratio; at a 2% rate and +10% lift, log(1 + lift) is within a few
    # thousandths of it (reference: scipy.stats.contingency.odds_ratio, sample odds ratio)
    n = 1_000_000
    table = np.array([[22_000, n - 22_000], [20_000, n - 20_000]])
    log_or = np.log(odds_ratio(table, kind="sample").statistic)
    assert abs(log_or - np.log1p(0.10)) < 0.003


@pytest.mark.parametrize("cols, column, words", [
    ({"exposed_share": [np.nan]}, "exposed_share", "needs the share of its test group"),
    ({"exposed_share": [1.4]}, "exposed_share", "above 0 and at most 1"),
    ({"exposed_share": [0.0]}, "exposed_share", "above 0 and at most 1"),
    ({"estimate": [-0.6]}, "estimate", "-100% or below"),
    ({"std_error": [0.0]}, "std_error", "must be above 0"),
    ({"std_error": ["n/a"]}, "std_error", "not a finite number"),
    ({"estimate": [np.inf]}, "estimate", "not a finite number"),
    ({"campaign": ["zzz"]}, "campaign", "not in the counts"),
    ({"campaign": [""]}, "campaign", "no campaign name"),
])
def test_unconvertible_tests_are_refused(cols, column, words):
    with pytest.raises(InputError) as e:
        check_experiments(_tests(**cols), "tests.csv", campaigns=["a"])
    assert e.value.column == column and words in e.value.problem
    assert e.value.exit_code == 2 and "row 1" in str(e.value) and "fix:" in str(e.value)


def test_invalid_measures_lists_the_choices():
    with pytest.raises(InputError) as e:
        check_experiments(_tests(measures=["everyone"]), "tests.csv", campaigns=["a"])
    assert str(e.value).splitlines()[0] == ("tests.csv, column 'measures': 1 row(s): not one of "
                                            + ", ".join(map(repr, MEASURES)))


def test_missing_column_and_unknown_column_and_duplicate_names():
    with pytest.raises(InputError, match="required column is missing"):
        check_experiments(_tests().drop(columns=["std_error"]), "t.csv")
    with pytest.raises(InputError, match="unknown column"):
        check_experiments(_tests(notes=["x"]), "t.csv")
    two = pd.concat([_tests(test=["same"]), _tests(test=["same"])])
    with pytest.raises(InputError, match="same test name"):
        check_experiments(two, "t.csv")


def test_read_refuses_empty_and_missing_files(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        read_experiments(tmp_path / "nope.csv")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(InputError, match="empty"):
        read_experiments(tmp_path / "empty.csv")
    (tmp_path / "head.csv").write_text("campaign,estimate,std_error,measures\n")
    with pytest.raises(InputError, match="no tests"):
        read_experiments(tmp_path / "head.csv")
