"""The command line as a user runs it (subprocesses against the installed package)."""

from __future__ import annotations

import json
import subprocess
import sys

import pandas as pd
import pytest

from liftpool import __version__


def run(*args, **kw):
    return subprocess.run([sys.executable, "-m", "liftpool", *map(str, args)], capture_output=True, text=True, **kw)


def test_version():
    r = run("--version")
    assert r.returncode == 0 and r.stdout.strip() == f"liftpool {__version__}"


@pytest.mark.parametrize("command", ["prepare", "simulate", "demo", "fit"])
def test_help_on_every_command(command):
    r = run(command, "--help")
    assert r.returncode == 0 and "usage: liftpool " + command in r.stdout


def test_console_script_installed():
    import shutil

    exe = shutil.which("liftpool") or str(__import__("pathlib").Path(sys.executable).parent / "liftpool")
    r = subprocess.run([exe, "--help"], capture_output=True, text=True)
    assert r.returncode == 0 and "prepare" in r.stdout


def test_simulate_then_prepare_csv(tmp_path):
    data = tmp_path / "data"
    r = run("simulate", "--out", data, "--scale", "0.03", "--format", "csv", "--seed", "11", "-q")
    assert r.returncode == 0, r.stderr
    out = tmp_path / "counts.csv"
    r = run("prepare", "--impressions", data / "impressions.csv", "--conversions", data / "conversions.csv",
            "--outcomes", data / "outcomes.csv", "--users", data / "users.csv", "--spend", data / "spend.csv",
            "--covariates", "frequency,device", "--window-days", "7", "--out", out)
    assert r.returncode == 0, r.stderr
    assert "Data preparation summary" in r.stdout
    counts = pd.read_csv(out)
    assert list(counts.columns) == ["campaign", "cell", "arm", "outcome", "role", "users", "conversions"]
    assert counts.cell[counts.cell != "(merged small cells)"].str.contains("device=").all()
    summary = json.loads((tmp_path / "counts.summary.json").read_text())
    assert summary["rules"]["window_days"] == 7.0
    # the same files as Parquet give the same counts
    r = run("simulate", "--out", tmp_path / "pq", "--scale", "0.03", "--seed", "11", "-q")
    pq = tmp_path / "pq"
    out2 = tmp_path / "counts.parquet"
    r = run("prepare", "--impressions", pq / "impressions.parquet", "--conversions", pq / "conversions.parquet",
            "--outcomes", pq / "outcomes.csv", "--users", pq / "users.parquet", "--covariates", "frequency,device",
            "--window-days", "7", "--out", out2, "-q")
    assert r.returncode == 0, r.stderr
    pd.testing.assert_frame_equal(counts, pd.read_parquet(out2), check_dtype=False)


def test_bad_option_value_lists_choices():
    r = run("prepare", "--impressions", "a.csv", "--conversions", "b.csv", "--outcomes", "c.csv", "--out", "x.csv",
            "--small-cells", "squash")
    assert r.returncode == 2 and "choose from 'merge', 'drop'" in r.stderr


def test_fit_quick_from_counts_file(tmp_path):
    data = tmp_path / "d"
    assert run("simulate", "--out", data, "--scale", "0.05", "--seed", "3", "-q").returncode == 0
    counts = tmp_path / "counts.parquet"
    r = run("prepare", "--impressions", data / "impressions.parquet", "--conversions", data / "conversions.parquet",
            "--outcomes", data / "outcomes.csv", "--out", counts, "-q")
    assert r.returncode == 0, r.stderr
    out = tmp_path / "fit"
    r = run("fit", "--counts", counts, "--out", out, "--quick", "--level", "0.8", "--seed", "4")
    assert r.returncode == 0, r.stderr
    assert "bias-corrected lift" in r.stdout and "observational estimate" in r.stdout
    s = pd.read_csv(out / "summary.csv")
    assert (s.level == 0.8).all() and {"lift", "bias", "p_lift_positive"} <= set(s.quantity)
    assert json.loads((out / "fit.json").read_text())["settings"]["seed"] == 4
    again = run("fit", "--counts", counts, "--out", out, "--quick")
    assert again.returncode == 2 and "never written over" in again.stderr


def test_fit_strict_exit_3_when_not_converged(tmp_path):
    counts = tmp_path / "c.csv"
    pd.DataFrame({"campaign": ["a"] * 4, "cell": ["all"] * 4, "arm": ["seen", "seen", "unseen", "unseen"],
                  "outcome": ["t", "p"] * 2, "role": ["target", "placebo"] * 2, "users": [1000] * 4,
                  "conversions": [30, 25, 20, 20]}).to_csv(counts, index=False)
    r = run("fit", "--counts", counts, "--out", tmp_path / "f", "--chains", "1", "--draws", "30", "--tune", "30",
            "--strict", "-q")
    assert r.returncode == 3, r.stderr
    assert "NOT CONVERGED" in r.stdout


def test_fit_bad_counts_exit_2(tmp_path):
    counts = tmp_path / "c.csv"
    pd.DataFrame({"campaign": ["a"], "cell": ["all"], "arm": ["seen"], "outcome": ["t"], "role": ["target"],
                  "users": [10], "conversions": [11]}).to_csv(counts, index=False)
    r = run("fit", "--counts", counts, "--out", tmp_path / "f")
    assert r.returncode == 2 and "more conversions than users" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "f").exists()


def test_fit_with_randomized_tests_and_report(tmp_path):
    # a tests file through the command line: converted, used, predicted without itself, shown (escaped) in the
    # report with the tipping points; a test that cannot be converted is refused with exit 2
    from liftpool.data_prep.shapes import scaled, shape_counts, shape_experiments

    sh = scaled("few_cells", campaigns=5, tested=2, excess_mean=0.15)
    counts, truth = shape_counts(sh, 6)
    counts.to_csv(tmp_path / "c.csv", index=False)
    tests = shape_experiments(sh, truth, 6)
    tests["test"] = ["<script>alert(1)</script>", "plain"]
    tests.to_csv(tmp_path / "t.csv", index=False)
    r = run("fit", "--counts", tmp_path / "c.csv", "--out", tmp_path / "f", "--quick", "--experiments",
            tmp_path / "t.csv")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "f" / "tests.csv").is_file() and (tmp_path / "f" / "heldout_check.csv").is_file()
    info = json.loads((tmp_path / "f" / "fit.json").read_text())["info"]
    assert info["tests"] == 2 and info["excess_bias"] and info["heldout"]["test"]["n"] == 2
    r = run("report", "--fit", tmp_path / "f", "--out", tmp_path / "r", "-q")
    assert r.returncode == 0, r.stderr
    html = (tmp_path / "r" / "report.html").read_text()
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert "Randomized tests beside the model" in html and "How much hidden bias" in html
    assert "holds unless" in html or "more likely than not unless" in html
    assert (tmp_path / "r" / "figures" / "randomized_tests.png").is_file()
    assert set(pd.read_csv(tmp_path / "r" / "tipping_points.csv")["campaign"]) >= {"camp0", "(portfolio)"}
    bad = tests.assign(measures="assigned", exposed_share=[0.5, 1.5])
    bad.to_csv(tmp_path / "bad.csv", index=False)
    r = run("fit", "--counts", tmp_path / "c.csv", "--out", tmp_path / "g", "--quick", "--experiments",
            tmp_path / "bad.csv")
    assert r.returncode == 2 and "exposed_share" in r.stderr and "row 2" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "g").exists()
