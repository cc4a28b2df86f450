"""Bad input: one clear message naming the file, column, first rows and the fix; exit 2; nothing written."""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

from liftpool.data_prep import InputError, prepare_counts, validate_counts
from liftpool.data_prep.rules import CountingRules
from tests.conftest import write_csvs

IMP = pd.DataFrame({"user_id": ["a", "b", "c"], "campaign": ["C1", "C1", "C2"],
                    "served_at": ["2026-03-01T10:00:00Z"] * 3, "viewable": ["true", "false", "true"]})
CONV = pd.DataFrame({"user_id": ["a"], "outcome": ["buy"], "converted_at": ["2026-03-02T10:00:00Z"]})
OUT = pd.DataFrame({"campaign": ["C1", "C1", "C2"], "outcome": ["buy", "visit", "buy"],
                    "role": ["target", "placebo", "target"]})


def files(tmp_path, imp=IMP, conv=CONV, out=OUT, **extra):
    return write_csvs(tmp_path, impressions=imp, conversions=conv, outcomes=out, **extra)


def err(tmp_path, **kw) -> InputError:
    p = files(tmp_path, **kw)
    with pytest.raises(InputError) as e:
        prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p.get("users"),
                       spend=p.get("spend"))
    return e.value


def test_misspelled_column_exact_message(tmp_path):
    e = err(tmp_path, imp=IMP.rename(columns={"campaign": "campain"}))
    path = tmp_path / "impressions.csv"
    assert str(e) == (f"{path}, column 'campaign': required column is missing "
                      "(the file has: user_id, campain, served_at, viewable)\n"
                      "  fix: rename column 'campain' to 'campaign'")


def test_unparseable_timestamp_exact_message(tmp_path):
    imp = IMP.assign(served_at=["2026-03-01T10:00:00Z", "yesterday", "2026-13-01"])
    e = err(tmp_path, imp=imp)
    assert str(e) == (f"{tmp_path / 'impressions.csv'}, column 'served_at': 2 value(s) are empty or not "
                      "ISO 8601 timestamps\n"
                      "  row 2: 'yesterday'\n"
                      "  row 3: '2026-13-01'\n"
                      "  fix: write timestamps in ISO 8601, e.g. 2026-03-01T14:05:00Z (no offset means UTC)")


@pytest.mark.parametrize(
    "change, column, words",
    [
        (dict(imp=IMP.assign(viewable=["true", "maybe", "false"])), "viewable", "not true/false"),
        (dict(imp=IMP.drop(columns="viewable")), "viewable", "neither a 'viewable' column"),
        (dict(imp=IMP.assign(user_id=["a", None, "c"])), "user_id", "empty value"),
        (dict(conv=CONV.assign(converted_at=["03/02/2026"])), "converted_at", "ISO 8601"),
        (dict(out=pd.concat([OUT, OUT.iloc[[0]]])), "campaign, outcome", "duplicate (campaign, outcome)"),
        (dict(out=OUT.assign(role=["target", "target", "target"])), "role", "has 2 target outcomes"),
        (dict(out=OUT.assign(role=["placebo", "placebo", "target"])), "role", "has no target outcome"),
        (dict(out=pd.concat([OUT, pd.DataFrame({"campaign": ["C1"], "outcome": ["buy"], "role": ["placebo"]})])),
         "role", "both the target and a placebo"),
        (dict(out=OUT.assign(role=["target", "negative", "target"])), "role", "not one of target, placebo"),
        (dict(out=pd.concat([OUT, pd.DataFrame({"campaign": ["C9"], "outcome": ["x"], "role": ["target"]})])),
         "campaign", "not in the impressions"),
        (dict(out=OUT[OUT.campaign == "C1"]), "campaign", "have no outcomes"),
        (dict(conv=CONV.assign(campaign=["C7"])), "campaign", "not in the impressions"),
        (dict(spend=pd.DataFrame({"campaign": ["C1", "C2"], "spend": [100, -5]})), "spend", "below 0"),
        (dict(spend=pd.DataFrame({"campaign": ["C1", "C3"], "spend": [100, 5]})), "campaign",
         "not in the impressions"),
        (dict(users=pd.DataFrame({"user_id": ["a", "a"], "x": [1, 2]})), "user_id", "more than one row"),
    ],
)
def test_bad_inputs_name_file_column_rows_and_fix(tmp_path, change, column, words):
    e = err(tmp_path, **change)
    assert e.column == column
    assert words in e.problem
    assert e.file and e.file.endswith(".csv")
    assert e.fix
    assert e.exit_code == 2


def test_offending_rows_are_listed(tmp_path):
    imp = pd.concat([IMP] * 4, ignore_index=True)
    imp.loc[[1, 5, 6, 7, 9, 10, 11], "viewable"] = "perhaps"
    e = err(tmp_path, imp=imp)
    assert [r.row for r in e.rows] == [2, 6, 7, 8, 10]  # first five, 1-based data rows
    assert e.n_bad == 7 and "... 2 more" in str(e)


def test_empty_and_header_only_files(tmp_path):
    p = files(tmp_path)
    p["impressions"].write_text("")
    with pytest.raises(InputError, match="the file is empty"):
        prepare_counts(p["impressions"], p["conversions"], p["outcomes"])
    p["impressions"].write_text("user_id,campaign,served_at,viewable\n")
    with pytest.raises(InputError, match="header but no data rows"):
        prepare_counts(p["impressions"], p["conversions"], p["outcomes"])


def test_unknown_extension_and_missing_file(tmp_path):
    p = files(tmp_path)
    with pytest.raises(InputError, match="unknown file type"):
        prepare_counts(tmp_path / "imp.xlsx", p["conversions"], p["outcomes"])
    with pytest.raises(InputError, match="file not found"):
        prepare_counts(tmp_path / "nope.csv", p["conversions"], p["outcomes"])


def test_covariate_not_in_users(tmp_path):
    p = files(tmp_path, users=pd.DataFrame({"user_id": ["a", "b"], "device": ["m", "d"]}))
    with pytest.raises(InputError, match="covariate 'screen' is not a column") as e:
        prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"],
                       rules=CountingRules(covariates=("screen",)))
    assert "device" in str(e.value)


COUNTS = pd.DataFrame({"campaign": ["C"] * 4, "cell": ["all"] * 4, "arm": ["seen", "seen", "unseen", "unseen"],
                       "outcome": ["buy", "visit"] * 2, "role": ["target", "placebo"] * 2,
                       "users": [100, 100, 50, 50], "conversions": [5, 3, 2, 1]})


@pytest.mark.parametrize(
    "change, column, words",
    [
        (lambda d: d.assign(users=[100, -1, 50, 50]), "users", "negative"),
        (lambda d: d.assign(conversions=[5, 3.5, 2, 1]), "conversions", "not whole numbers"),
        (lambda d: d.assign(conversions=[500, 3, 2, 1]), "conversions", "more conversions than users"),
        (lambda d: d.assign(arm=["seen", "seen", "unseen", "control"]), "arm", "not one of"),
        (lambda d: d.assign(role=["target", "placebo", "target", "target"]), "role", "both target and placebo"),
        (lambda d: d.assign(role=["target"] * 4), "role", "2 target outcomes"),
        (lambda d: d.assign(role=["placebo"] * 4), "role", "0 target outcomes"),
        (lambda d: pd.concat([d, d.iloc[[0]]]), "campaign, cell, arm, outcome", "repeat"),
        (lambda d: d.drop(columns="users"), "users", "missing"),
        (lambda d: d.assign(users=["100", "x", "50", "50"]), "users", "not numbers"),
        (lambda d: d.assign(campaign="(portfolio)"), "campaign", "reserved campaign name"),
        (lambda d: d.assign(users=[1e19, 100, 50, 50]), "users", "above 10,000,000,000, more than any audience"),
        (lambda d: d.assign(campaign="(new campaign)"), "campaign", "reserved campaign name"),
        (lambda d: d.assign(arm=["unseen"] * 4).drop_duplicates(["outcome"]), "arm",
         "campaign 'C' has no seen users for its target outcome"),
        (lambda d: d.assign(arm=["unexposed"] * 4).drop_duplicates(["outcome"]), "arm",
         "campaign 'C' has no seen and no unseen users for its target outcome"),
        (lambda d: d.assign(users=[100, 100, 0, 50], conversions=[5, 3, 0, 1]), "arm",
         "campaign 'C' has no unseen users for its target outcome"),
    ],
)
def test_bad_counts_tables(change, column, words):
    with pytest.raises(InputError) as e:
        validate_counts(change(COUNTS), "counts.csv")
    assert e.value.column == column and words in e.value.problem and e.value.file == "counts.csv"


def test_counts_with_covariate_columns_build_cells():
    d = COUNTS.drop(columns="cell").assign(device="mobile")
    got = validate_counts(d)
    assert set(got.cell) == {"device=mobile"}


def test_cli_bad_input_exit_2_no_traceback_nothing_written(tmp_path):
    p = files(tmp_path, imp=IMP.assign(served_at=["2026-03-01T10:00:00Z", "yesterday", "x"]))
    out = tmp_path / "out" / "counts.parquet"
    r = subprocess.run([sys.executable, "-m", "liftpool", "prepare", "--impressions", str(p["impressions"]),
                        "--conversions", str(p["conversions"]), "--outcomes", str(p["outcomes"]),
                        "--out", str(out)], capture_output=True, text=True)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr
    assert r.stderr.count("error: ") == 1 and "served_at" in r.stderr and "fix:" in r.stderr
    assert not out.parent.exists() or not any(out.parent.iterdir())


def test_invalid_start_lists_the_valid_choices():
    from liftpool.data_prep.errors import ConfigError
    from liftpool.models import ModelSettings

    with pytest.raises(ConfigError) as e:
        ModelSettings(init="advi")
    assert e.value.problem == ("invalid value 'advi' for 'init'; valid choices are 'auto', 'advi+adapt_diag', "
                               "'jitter+adapt_diag'")
    assert e.value.fix == "set 'init' to one of 'auto', 'advi+adapt_diag', 'jitter+adapt_diag'"


def test_reserved_campaign_names_exact_message():
    with pytest.raises(InputError) as e:
        validate_counts(COUNTS.assign(campaign="(portfolio)"), "counts.csv")
    assert e.value.problem == ("4 row(s) use a reserved campaign name ((portfolio), (new campaign): the report's "
                               "pooled rows)")
    assert e.value.fix == "rename the campaign"


def test_file_names_with_pattern_characters_are_read_literally(tmp_path):
    # DuckDB expands * ? [..] in file names: impressions[12].csv must not read impressions1.csv
    from pathlib import Path

    from liftpool.data_prep import write_scenario

    paths = write_scenario(tmp_path / "a", seed=3, scale=0.05, fmt="csv")
    good = prepare_counts(paths["impressions"], paths["conversions"], paths["outcomes"], users=paths["users"])
    odd = tmp_path / "impressions[12].csv"
    odd.write_bytes(Path(paths["impressions"]).read_bytes())
    decoy = tmp_path / "impressions1.csv"  # what the pattern would match
    decoy.write_text(Path(paths["impressions"]).read_text().splitlines()[0] + "\n")
    got = prepare_counts(odd, paths["conversions"], paths["outcomes"], users=paths["users"])
    pd.testing.assert_frame_equal(got.counts, good.counts)
    star = tmp_path / "imp*.csv"
    star.write_bytes(Path(paths["impressions"]).read_bytes())
    got = prepare_counts(star, paths["conversions"], paths["outcomes"], users=paths["users"])
    pd.testing.assert_frame_equal(got.counts, good.counts)


@pytest.mark.parametrize("cls, key, value, message", [
    ("CountingRules", "unexposed", "no", "'unexposed' must be true or false (no quotes), got 'no'"),
    ("ModelSettings", "seed", "abc", "'seed' must be a whole number, got 'abc'"),
    ("ModelSettings", "draws", 2.5, "'draws' must be a whole number, got 2.5"),
    ("ModelSettings", "level", "0.9", "'level' must be a number, got '0.9'"),
    ("ModelSettings", "outcome_bias", 1, "'outcome_bias' must be true or false (no quotes), got 1"),
    ("ModelSettings", "target_accept", "high", "'target_accept' must be a number, got 'high'"),
])
def test_settings_values_are_type_checked_exact_message(cls, key, value, message):
    from liftpool.data_prep import CountingRules
    from liftpool.data_prep.errors import ConfigError
    from liftpool.models import ModelSettings

    C = {"CountingRules": CountingRules, "ModelSettings": ModelSettings}[cls]
    with pytest.raises(ConfigError) as e:
        C.from_mapping({key: value})
    assert e.value.problem == message


def test_workspace_config_with_a_wrong_type_exits_2(tmp_path):
    import subprocess
    import sys

    from liftpool.data_prep import write_scenario

    paths = write_scenario(tmp_path / "in", seed=3, scale=0.05)
    ws = tmp_path / "ws"
    args = [sys.executable, "-m", "liftpool"]
    subprocess.run(args + ["init", str(ws), "--impressions", str(paths["impressions"]), "--conversions",
                           str(paths["conversions"]), "--outcomes", str(paths["outcomes"])], check=True,
                   capture_output=True)
    cfg = ws / "liftpool.toml"
    cfg.write_text(cfg.read_text().replace("[model]", "[model]\ndraws = 2.5", 1) if "[model]" in cfg.read_text()
                   else cfg.read_text() + "\n[model]\ndraws = 2.5\n")
    r = subprocess.run(args + ["check", str(ws)], capture_output=True, text=True)
    assert r.returncode == 2, r.stdout + r.stderr
    assert "'draws' must be a whole number, got 2.5" in r.stdout + r.stderr
    assert "Traceback" not in r.stderr


def test_prepare_out_names_and_pairs(tmp_path):
    import subprocess
    import sys

    from liftpool.data_prep import write_scenario

    p = write_scenario(tmp_path / "in", seed=3, scale=0.05)
    base = [sys.executable, "-m", "liftpool", "prepare", "--impressions", str(p["impressions"]), "--conversions",
            str(p["conversions"]), "--outcomes", str(p["outcomes"])]
    # a compressed CSV is refused before any work, with exit 2 and nothing written
    r = subprocess.run(base + ["--out", str(tmp_path / "counts.csv.gz")], capture_output=True, text=True)
    assert r.returncode == 2 and "must end in .parquet or .csv" in r.stderr and "Traceback" not in r.stderr
    assert not list(tmp_path.glob("counts*"))
    (tmp_path / "dir.parquet").mkdir()
    r = subprocess.run(base + ["--out", str(tmp_path / "dir.parquet")], capture_output=True, text=True)
    assert r.returncode == 2 and "--out is a folder" in r.stderr
    # two versions get two summaries
    for v in ("v1", "v2"):
        assert subprocess.run(base + ["--out", str(tmp_path / f"counts.{v}.parquet")], capture_output=True).returncode == 0
    assert (tmp_path / "counts.v1.summary.json").is_file() and (tmp_path / "counts.v2.summary.json").is_file()


@pytest.mark.parametrize("damage", ["fit.json", "summary.csv", "posterior.nc", "no posterior.nc", "estimands.nc"])
def test_a_damaged_fit_folder_is_bad_input_naming_the_file(tmp_path, damage):
    import shutil

    from liftpool.data_prep.shapes import SHAPES, shape_counts
    from liftpool.models import ModelSettings, fit_counts, load_fit

    counts, _ = shape_counts(SHAPES["few_cells"], 1)
    good = fit_counts(counts, ModelSettings(), quick=True).save(tmp_path / "fit")
    bad = tmp_path / "bad"
    shutil.copytree(good, bad)
    name = damage.replace("no ", "")
    target = bad / name
    if damage.startswith("no "):
        target.unlink()
    elif name.endswith(".nc"):
        b = bytearray(target.read_bytes())
        mid = len(b) // 2
        b[mid:mid + 4096] = bytes(x ^ 0xFF for x in b[mid:mid + 4096])  # 4 KB of flipped bytes
        target.write_bytes(bytes(b))
    else:
        target.write_text("{broken")
    with pytest.raises(InputError) as e:
        load_fit(bad)
    assert e.value.file == str(target) and "the fit's file is missing or damaged" in e.value.problem
    assert e.value.fix == "fit again into a new folder (an earlier fit is never changed by liftpool)"


def test_all_zero_target_conversions_exact_message():
    with pytest.raises(InputError) as e:
        validate_counts(COUNTS.assign(conversions=[0, 3, 0, 1]), "counts.csv")
    assert e.value.problem == "the table has no target conversions at all (every target row has 0)"
    assert e.value.column == "conversions"


def test_prep_summary_must_be_one_and_of_these_counts(tmp_path):
    from liftpool.data_prep import PrepSummary
    from liftpool.data_prep.shapes import SHAPES, shape_counts
    from liftpool.models import ModelSettings, fit_counts
    from liftpool.reports import write_report

    counts, _ = shape_counts(SHAPES["few_cells"], 1)
    fit = fit_counts(counts, ModelSettings(), quick=True)
    with pytest.raises(InputError) as e:
        write_report(fit, tmp_path / "r1", prep_summary=PrepSummary.from_dict({}))
    assert e.value.problem.startswith("not a prep summary")
    other = PrepSummary.from_dict({"campaigns": [{"campaign": "elsewhere", "nonviewable_share": 0.5}]})
    with pytest.raises(InputError) as e:
        write_report(fit, tmp_path / "r2", prep_summary=other)
    assert e.value.problem.startswith("the prep summary is of other data: 8 fitted campaign(s) are not in it")
    assert not (tmp_path / "r1").exists() and not (tmp_path / "r2").exists()


def test_a_header_naming_a_column_twice_is_refused(tmp_path):
    from liftpool.data_prep import write_scenario

    p = write_scenario(tmp_path / "in", seed=3, scale=0.05, fmt="csv")
    text = p["impressions"].read_text().splitlines()
    head = text[0].split(",")
    text[0] = ",".join(head[:-1] + [head[0]])  # the last column renamed to the first's name
    bad = tmp_path / "dup.csv"
    bad.write_text("\n".join(text) + "\n")
    with pytest.raises(InputError) as e:
        prepare_counts(bad, p["conversions"], p["outcomes"])
    assert e.value.problem == f"the header names {head[0]!r} more than once" and e.value.file == str(bad)


def test_an_impression_logged_twice_is_counted_and_said(tmp_path):
    # valid (two ads on one page in the same second look alike without an impression id), but an
    # export joined twice looks the same: a warning with the count, in the summary and its JSON
    imp = pd.concat([IMP, IMP.iloc[[1]]], ignore_index=True)
    p = files(tmp_path, imp=imp)
    res = prepare_counts(p["impressions"], p["conversions"], p["outcomes"])
    assert res.summary.warnings[:1] == [
        f"{tmp_path / 'impressions.csv'}: 1 impression row(s) (25.0%) repeat an earlier row exactly (user, "
        "campaign, time and measurement). They are counted as separate impressions (two ads on one page in "
        "the same second); if the export duplicated them, remove the repeats, since they raise the "
        "frequency cells"]
    assert res.summary.totals["impressions_measured"] == 4
    assert "WARNING: " + res.summary.warnings[0] in res.summary.render()
    assert res.summary.to_dict()["warnings"] == res.summary.warnings


def test_the_same_impression_at_another_time_is_valid(tmp_path):
    imp = pd.concat([IMP, IMP.iloc[[1]].assign(served_at="2026-03-01T10:00:01Z")], ignore_index=True)
    p = files(tmp_path, imp=imp)
    res = prepare_counts(p["impressions"], p["conversions"], p["outcomes"])
    assert res.summary.totals["impressions_measured"] == 4
    assert not any("repeat an earlier row" in w for w in res.summary.warnings)


@pytest.mark.parametrize("value", ["inf", "-inf", "Infinity"])
def test_an_infinite_users_covariate_is_refused(tmp_path, value):
    users = pd.DataFrame({"user_id": ["a", "b", "c"], "age": ["31", value, "45"]})
    p = files(tmp_path, users=users)
    with pytest.raises(InputError) as e:
        prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"],
                       rules=CountingRules(covariates=("age",)))
    assert str(e.value) == (f"{tmp_path / 'users.csv'}, column 'age': 1 value(s) are infinite\n"
                            f"  row 2: '{value}'\n"
                            "  fix: write age as a finite number, or leave it empty when unknown")


def test_a_misspelled_outcome_is_refused_with_the_close_name(tmp_path):
    # the target 'purchse' has no conversion row; 'purchase' has rows and no campaign lists it: the
    # campaign would silently get 0 target conversions
    conv = pd.DataFrame({"user_id": ["a", "b"], "outcome": ["purchase", "purchase"],
                         "converted_at": ["2026-03-02T10:00:00Z"] * 2})
    out = pd.DataFrame({"campaign": ["C1", "C2"], "outcome": ["purchse", "purchse"], "role": ["target", "target"]})
    e = err(tmp_path, conv=conv, out=out)
    assert str(e) == (f"{tmp_path / 'outcomes.csv'}, column 'outcome': outcome 'purchse' (target of 'C1', "
                      "target of 'C2') has no conversion rows, but the conversions have 'purchase' (2 rows), "
                      "which no campaign lists\n"
                      "  row 1: 'C1', 'purchse', 'target'\n"
                      "  row 2: 'C2', 'purchse', 'target'\n"
                      "  fix: if they are the same outcome, spell it 'purchase' in the outcomes file")


def test_an_outcome_without_conversions_is_said(tmp_path):
    # 'visit' (a placebo of C1) has no conversion row and nothing like it: valid, said
    p = files(tmp_path)
    res = prepare_counts(p["impressions"], p["conversions"], p["outcomes"])
    assert res.summary.warnings == [f"{tmp_path / 'outcomes.csv'}: outcome 'visit' (placebo of 'C1') has no "
                                    f"conversion rows in {tmp_path / 'conversions.csv'}; it adds nothing to the "
                                    "estimate"]


def test_large_ads_without_their_measurement_column_are_said(tmp_path):
    # 970 x 250 = 242,500 px: the 30% rule applies (MRC/IAB display guideline, docs/counting-rules.md),
    # and without seconds_in_view_30 such an impression is unmeasured
    imp = pd.DataFrame({"user_id": ["a", "b", "c", "d"], "campaign": ["C1", "C1", "C2", "C2"],
                        "served_at": ["2026-03-01T10:00:00Z"] * 4, "ad_format": ["display"] * 4,
                        "ad_width": [300, 970, 970, 300], "ad_height": [250, 250, 250, 250],
                        "seconds_in_view_50": [1.5, 2.0, 0.0, 0.2]})
    p = files(tmp_path, imp=imp)
    res = prepare_counts(p["impressions"], p["conversions"], p["outcomes"])
    assert (f"{tmp_path / 'impressions.csv'}: 2 display impression(s) (50.0%) are 242,500 pixels or larger, where "
            "the 30% rule applies, but the file has no seconds_in_view_30 column: they count as unmeasured. Add "
            "the column to measure them") in res.summary.warnings
    assert res.summary.totals["impressions_measured"] == 2
