"""Confounder screening: SMD against a hand computation and statsmodels, and known truth on the simulator."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from liftpool.data_prep import CountingRules, prepare_counts
from liftpool.data_prep.errors import InputError
from liftpool.data_prep.screening import open_screen, smd_binary, smd_numeric
from liftpool.data_prep.sources import open_inputs
from liftpool.screen import screen, screen_inputs

T0 = pd.Timestamp("2026-03-01T00:00:00Z")


def iso(ts) -> str:
    return ts.strftime("%Y-%m-%dT%H:%M:%SZ")


def test_smd_functions_against_hand_and_statsmodels():
    # Hand computation of Austin 2009 (Statistics in Medicine 28(25)), eq. 1:
    # x_seen = 1,2,3,4 (mean 2.5, sample var 5/3); x_unseen = 2,2,3,5 (mean 3, sample var 2)
    # d = (2.5 - 3) / sqrt((5/3 + 2) / 2) = -0.5 / sqrt(11/6) = -0.369274...
    assert smd_numeric(2.5, 5 / 3, 3.0, 2.0) == pytest.approx(-0.5 / np.sqrt(11 / 6), rel=1e-12)
    assert smd_numeric(-0.5 / np.sqrt(11 / 6), 0, 0, 0) == 0  # both variances zero: no difference to scale
    # eq. 2 for a proportion: p = 0.3 vs 0.5 -> (0.3 - 0.5) / sqrt((0.21 + 0.25) / 2) = -0.41703...
    assert smd_binary(0.3, 0.5) == pytest.approx(-0.2 / np.sqrt(0.23), rel=1e-12)
    # statsmodels 0.15 meta_analysis.effectsize_smd pools variances by n - 1 (the same as Austin's
    # mean of the two variances when the groups are equal) and multiplies by Hedges' correction
    # 1 - 3 / (4 n - 9), which is divided out here.
    from statsmodels.stats.meta_analysis import effectsize_smd

    rng = np.random.default_rng(0)
    x1, x0 = rng.normal(1.0, 2.0, 50), rng.normal(0.4, 1.5, 50)
    bc, _ = effectsize_smd(x1.mean(), x1.std(ddof=1), 50, x0.mean(), x0.std(ddof=1), 50)
    ref = bc / (1 - 3 / (4 * 100 - 9))
    assert smd_numeric(x1.mean(), x1.var(ddof=1), x0.mean(), x0.var(ddof=1)) == pytest.approx(ref, rel=1e-12)


def _hand_log():
    """Campaign A: seen u1-u4, unseen u5-u8 (each one impression); users with age and device."""
    imp = pd.DataFrame([(f"u{i}", "A", iso(T0), "true" if i <= 4 else "false") for i in range(1, 9)],
                       columns=["user_id", "campaign", "served_at", "viewable"])
    conv = pd.DataFrame([("u1", "visit", iso(T0 + pd.Timedelta(days=1))),
                         ("u5", "visit", iso(T0 + pd.Timedelta(days=2))),
                         ("u2", "buy", iso(T0 + pd.Timedelta(days=1)))],
                        columns=["user_id", "outcome", "converted_at"])
    outc = pd.DataFrame([("A", "buy", "target"), ("A", "visit", "placebo")], columns=["campaign", "outcome", "role"])
    users = pd.DataFrame({"user_id": [f"u{i}" for i in range(1, 9)],
                          "age": [1, 2, 3, 4, 2, 2, 3, 5],
                          "device": ["d", "d", "m", "m", "d", "m", "m", "m"]})
    return imp, conv, outc, users


def test_balance_of_the_screen_table_matches_hand_values():
    imp, conv, outc, users = _hand_log()
    inputs = open_inputs(imp, conv, outc, users=users, covariates=("age", "device"))
    data = open_screen(inputs, CountingRules(covariates=(), min_cell_users=1))
    b = data.balance().set_index(["covariate", "level"])
    # age: seen 1,2,3,4 and unseen 2,2,3,5 -> the worked value above
    assert b.loc[("age", ""), "smd"] == pytest.approx(-0.5 / np.sqrt(11 / 6), rel=1e-12)
    # device 'd': seen 2/4, unseen 1/4 -> (0.5 - 0.25) / sqrt((0.25 + 0.1875) / 2)
    assert b.loc[("device", "d"), "smd"] == pytest.approx(0.25 / np.sqrt(0.4375 / 2), rel=1e-12)
    assert bool(b.loc[("device", "d"), "flagged"]) and b.loc[("device", "d"), "users"] == 8
    # every user has one impression: frequency is constant, SMD 0
    assert b.loc[("frequency", ""), "smd"] == 0
    # after stratifying on device, device is balanced exactly; age is reweighted:
    # cell d: seen u1,u2 (ages 1,2), unseen u5 (2) weight (2/4)/(1/4) = 2
    # cell m: seen u3,u4 (3,4), unseen u6,u7,u8 (2,3,5) weight (2/4)/(3/4) = 2/3 each
    # weighted unseen mean = (2*2 + (2+3+5)*2/3) / 4 = (4 + 20/3) / 4 = 8/3; seen mean 2.5
    a = data.balance(("device",)).set_index(["covariate", "level"])
    assert a.loc[("device", "d"), "smd"] == pytest.approx(0.0, abs=1e-12)
    assert a.loc[("age", ""), "smd"] == pytest.approx((2.5 - 8 / 3) / np.sqrt(11 / 6), rel=1e-12)


def test_placebo_association_matches_hand_values():
    imp, conv, outc, users = _hand_log()
    inputs = open_inputs(imp, conv, outc, users=users, covariates=("age", "device"))
    data = open_screen(inputs, CountingRules(covariates=(), min_cell_users=1))
    a = data.placebo_association().set_index(["covariate", "level"])
    # placebo 'visit' converters: u1 (age 1, d), u5 (age 2, d); the other six: ages 2,3,4,2,3,5
    conv_age, other = np.array([1, 2.0]), np.array([2, 3, 4, 2, 3, 5.0])
    hand = (conv_age.mean() - other.mean()) / np.sqrt((conv_age.var(ddof=1) + other.var(ddof=1)) / 2)
    assert a.loc[("age", ""), "smd"] == pytest.approx(hand, rel=1e-12)
    # device d: 2/2 of converters, 1/6 of the others (u2)
    assert a.loc[("device", "d"), "smd"] == pytest.approx(float(smd_binary(1.0, 1 / 6)), rel=1e-12)


def test_screen_counts_are_the_prepare_counts(small_scenario):
    # the screen never changes the counting rules: its counts for a cell choice are prepare's
    p = small_scenario
    rules = CountingRules(covariates=("device", "view_history"))
    inputs = open_inputs(p["impressions"], p["conversions"], p["outcomes"], users=p["users"],
                         covariates=("device", "region", "age"))
    data = open_screen(inputs, rules)
    got, _ = data.counts(("device", "view_history"))
    ref = prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], rules=rules).counts
    key = ["campaign", "cell", "arm", "outcome"]
    pd.testing.assert_frame_equal(got.sort_values(key).reset_index(drop=True),
                                  ref.sort_values(key).reset_index(drop=True))


@pytest.fixture(scope="module")
def noisy_scenario(small_scenario, tmp_path_factory):
    """The simulator's users plus two pure-noise columns (invented data, simulation only)."""
    u = pd.read_parquet(small_scenario["users"])
    rng = np.random.default_rng(11)
    u["noise_level"] = rng.choice(["a", "b", "c"], len(u))
    u["noise_score"] = rng.normal(size=len(u))
    path = tmp_path_factory.mktemp("noisy") / "users.parquet"
    u.to_parquet(path)
    return {**small_scenario, "users": path}


@pytest.fixture(scope="module")
def demo_screen(noisy_scenario):
    p = noisy_scenario
    return screen_inputs(p["impressions"], p["conversions"], p["outcomes"], users=p["users"])


def test_simulator_ranks_a_browsing_proxy_first_and_bias_falls(demo_screen):
    # known truth: the simulator's seen/unseen bias comes from a browsing trait that drives both
    # viewability and every conversion; the viewability history and the device (desktop users browse
    # more, data_prep/simulate.py) are its proxies, region and age are not
    r = demo_screen
    proxies = {"view_history", "device"}
    assert r.ranking.iloc[0]["covariate"] in proxies
    first = r.ranking.iloc[0]
    assert abs(first["bias_with"]) < abs(first["bias_without"]) - 0.015
    assert r.suggested[0] in proxies
    order = list(r.ranking["covariate"])
    assert max(order.index(p) for p in proxies) < min(order.index(c) for c in ("region", "age"))
    s = r.steps.set_index("step")
    assert abs(s.loc[1, "bias"]) < abs(s.loc[0, "bias"])
    assert list(s["cells"].iloc[:2]) == sorted(s["cells"].iloc[:2])  # cells shown at each step


def test_pure_noise_is_not_suggested(demo_screen):
    r = demo_screen
    assert "noise_level" not in r.suggested and "noise_score" not in r.suggested
    noise = r.ranking.set_index("covariate").loc[["noise_level", "noise_score"]]
    assert (noise["bias_removed"].abs() < 0.02).all()
    # a noise column is balanced by construction (independent of viewing): no campaign-weighted flag
    summ = r.balance_summary().set_index("covariate")
    assert (summ.loc[["noise_level", "noise_score"], "mean_abs_smd_before"] < 0.1).all()


def test_suggested_cells_balance_their_covariates(demo_screen):
    r = demo_screen
    summ = r.balance_summary()
    for cov in r.suggested:  # every suggested covariate: flagged before, at least halved after
        rows = summ[summ["covariate"] == cov]
        assert rows["mean_abs_smd_before"].max() > 0.1, cov  # Austin 2009 rule of thumb
        assert (rows["mean_abs_smd_after"] < rows["mean_abs_smd_before"] / 2 + 1e-12).all(), cov


def test_unknown_candidate_has_an_exact_message(noisy_scenario):
    p = noisy_scenario
    with pytest.raises(InputError) as e:
        screen_inputs(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], candidates=["colour"])
    assert str(e.value) == (f"{p['users']}, column 'colour': candidate covariate 'colour' is neither a users "
                            "column (device, region, age, noise_level, noise_score) nor a built-in\n"
                            "  fix: choose users columns or the built-ins frequency, view_history")


def test_screen_cli_and_report_appendix(noisy_scenario, tmp_path):
    from liftpool.cli import main

    p = noisy_scenario
    out = tmp_path / "screen"
    args = ["screen", "--impressions", str(p["impressions"]), "--conversions", str(p["conversions"]),
            "--outcomes", str(p["outcomes"]), "--users", str(p["users"]), "--candidates",
            "view_history,noise_level", "--out", str(out), "-q"]
    assert main(args) == 0
    doc = json.loads((out / "screen.json").read_text())
    assert doc["suggested"] == ["view_history"]
    assert (out / "balance.png").read_bytes()[:4] == b"\x89PNG"
    assert main(args) == 2  # never written over

    # the report appendix carries the screen's tables (and the XLSX its sheets)
    from liftpool.data_prep import prepare_counts as prep
    from liftpool.models import ModelSettings, fit_counts
    from liftpool.reports import write_report
    from liftpool.screen import load_screen

    counts = prep(p["impressions"], p["conversions"], p["outcomes"], users=p["users"]).counts
    fit = fit_counts(counts, ModelSettings(seed=1), quick=True)
    rep = write_report(fit, tmp_path / "report", screen=load_screen(out))
    html = (rep / "report.html").read_text()
    assert "<h3>Confounder screen</h3>" in html and "noise_level" in html.replace("<wbr>", "")  # names may break after _
    import openpyxl

    wb = openpyxl.load_workbook(rep / "tables.xlsx")
    assert {"screen_ranking", "screen_balance"} <= set(wb.sheetnames)
    assert (rep / "figures" / "covariate_balance.png").is_file()


def test_screen_of_data_object_with_step_limit(noisy_scenario):
    p = noisy_scenario
    inputs = open_inputs(p["impressions"], p["conversions"], p["outcomes"], users=p["users"], covariates=("device",))
    data = open_screen(inputs, CountingRules(covariates=()), candidates=["device", "view_history"])
    r = screen(data, max_steps=1)
    assert len(r.suggested) <= 1 and len(r.steps) <= 2


def test_workspace_screen_goes_into_the_next_report(noisy_scenario, tmp_path):
    from liftpool.cli import main
    from liftpool.workspace import Workspace

    p = noisy_scenario
    ws = Workspace.init(tmp_path / "ws", p["impressions"], [p["conversions"]], [p["outcomes"]], users=p["users"])
    assert main(["screen", str(ws.path), "--candidates", "view_history,noise_score", "-q"]) == 0
    assert (ws.path / "screens" / "001" / "screen.json").is_file()
    assert main(["screen", str(ws.path), "--candidates", "view_history", "-q"]) == 0
    assert (ws.path / "screens" / "002" / "screen.json").is_file()  # a new screen never replaces one
    assert ws.latest_screen().suggested == ("view_history",)
    assert ws.latest_screen().steps["covariates"].iloc[0] == ""  # step 0: no covariates, read back as text
    assert main(["prepare", str(ws.path), "-q"]) == 0
    assert main(["fit", str(ws.path), "--quick", "-q"]) == 0
    assert main(["report", str(ws.path), "-q"]) == 0
    html = next((ws.path / "reports").glob("*/report.html")).read_text()
    assert "<h3>Confounder screen</h3>" in html
