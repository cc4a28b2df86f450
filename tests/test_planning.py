"""Planning: the analytic normal approximation against the standard sample size and simulation."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from liftpool.data_prep.errors import ConfigError
from liftpool.models.planning import PlanInputs, plan, simulate_plan, variance_parts, width_curve

NO_BIAS = dict(bias=False, placebos=0, campaigns=1, seen_share=0.5)


def fleiss_per_group(p1, p2, alpha, power):
    """Fleiss formula, equal groups, written out here from ../shared/references.md (Fleiss, Statistical
    Methods for Rates and Proportions): n = [z_{1-a/2} sqrt(2 pbar qbar) + z_{1-b} sqrt(p1 q1 + p2 q2)]^2 / d^2."""
    za, zb = stats.norm.ppf(1 - alpha / 2), stats.norm.ppf(power)
    pbar = (p1 + p2) / 2
    num = za * np.sqrt(2 * pbar * (1 - pbar)) + zb * np.sqrt(p1 * (1 - p1) + p2 * (1 - p2))
    return num**2 / (p1 - p2) ** 2


def test_no_bias_users_equal_statsmodels_worked_value():
    # statsmodels samplesize_proportions_2indep_onetail(0.25, 0.5, 0.9, alternative='two-sided') = 76.707
    # per group; R power.prop.test(p1=0.50, p2=0.75, power=0.90) gives 76.7 (../shared/references.md).
    # Unseen rate 0.25, seen 0.5 (lift +100%), 95% interval, 90% power; users are seen + unseen.
    p = plan(PlanInputs(users=1000, baseline_rate=0.25, lift=1.0, level=0.95, **NO_BIAS), power=0.9)
    assert p.users_for_power / 2 == pytest.approx(76.707, abs=5e-4)


def test_no_bias_users_equal_statsmodels_and_fleiss_across_inputs():
    # statsmodels >= 0.14 (the dev extra)
    from statsmodels.stats.proportion import samplesize_proportions_2indep_onetail

    for p0, lift, level, power in [(0.01, 0.1, 0.95, 0.8), (0.05, 0.2, 0.9, 0.9), (0.3, -0.2, 0.95, 0.85)]:
        p = plan(PlanInputs(users=1000, baseline_rate=p0, lift=lift, level=level, **NO_BIAS), power=power)
        ref = samplesize_proportions_2indep_onetail(p0 * (1 + lift) - p0, p0, power, alpha=1 - level,
                                                    alternative="two-sided")
        assert p.users_for_power / 2 == pytest.approx(ref, rel=1e-6)
        assert p.users_for_power / 2 == pytest.approx(fleiss_per_group(p0 * (1 + lift), p0, 1 - level, power), rel=1e-6)


def test_ad_scale_worked_value():
    # ../shared/references.md (computed): 1.0% vs 1.1%, two-sided alpha 0.05, 80% power: about 163,000 per group
    p = plan(PlanInputs(users=1000, baseline_rate=0.01, lift=0.1, level=0.95, **NO_BIAS), power=0.8)
    assert p.users_for_power / 2 == pytest.approx(163_000, rel=0.005)


def test_no_bias_power_matches_r_power_prop_test():
    # R power.prop.test(n = 50, p1 = 0.50, p2 = 0.75) gives power 0.740 (../shared/references.md)
    p = plan(PlanInputs(users=100, baseline_rate=0.5, lift=0.5, level=0.95, **NO_BIAS))
    assert p.prob_excludes_zero == pytest.approx(0.740, abs=0.0015)


def test_no_bias_width_is_the_wald_interval():
    # With no bias terms the log-odds variance is Woolf's 1/(n_s p_s q_s) + 1/(n_u p_u q_u)
    # (Woolf 1955, from memory); checked against statsmodels' Table2x2 log odds ratio standard error
    # on the expected table.
    from statsmodels.stats.contingency_tables import Table2x2

    n = 40_000
    inp = PlanInputs(users=n, baseline_rate=0.02, lift=0.15, **NO_BIAS)
    ps, pu = 0.02 * 1.15, 0.02
    t = Table2x2(np.array([[n / 2 * ps, n / 2 * (1 - ps)], [n / 2 * pu, n / 2 * (1 - pu)]]))
    assert np.sqrt(variance_parts(inp)["pooled"]) == pytest.approx(t.log_oddsratio_se, rel=1e-9)


def test_floor_exists_and_more_placebos_lower_it():
    inp = PlanInputs(users=1e5, baseline_rate=0.01, lift=0.1, placebos=2, bias_sd=0.1, residual_sd=0.05)
    widths = [plan(inp.with_users(n)).width for n in (1e5, 1e6, 1e7, 1e8, 1e10)]
    assert all(a > b for a, b in zip(widths, widths[1:], strict=False))  # more users: narrower ...
    floor = plan(inp).floor_width
    assert widths[-1] == pytest.approx(floor, rel=1e-3)  # ... but never below the floor
    assert floor > 0.12
    # the floor is sqrt(residual^2 * t-factor + campaign-bias posterior variance); computed here by hand
    m, df = 2, 1 * 2 - 1
    r2 = 0.05**2 * 3.0  # df <= 2: the capped factor
    assert df <= 2
    post_b = 1 / (1 / 0.1**2 + m / r2)
    w = post_b / 0.1**2
    var = r2 + post_b + w**2 * (0.1**2 + r2 / m)
    assert variance_parts(inp, np.inf)["pooled"] == pytest.approx(var, rel=1e-12)
    floors = [plan(PlanInputs(users=1e5, placebos=m)).floor_width for m in (1, 2, 4, 8, 16, 64)]
    assert all(a > b for a, b in zip(floors, floors[1:], strict=False))
    # with many placebos the floor tends to the target's own residual (times the t-factor, -> 1)
    assert floors[-1] == pytest.approx(plan(PlanInputs(users=1e5, placebos=10_000, bias_sd=0.1)).floor_width,
                                       rel=0.05)


def test_no_bias_has_no_floor():
    inp = PlanInputs(users=1e5, **NO_BIAS)
    assert plan(inp).floor_width == 0
    assert plan(inp.with_users(1e12)).width < 0.001


def test_target_width_below_floor_is_not_reachable_and_above_is_solved():
    inp = PlanInputs(users=1e5, placebos=4)
    p = plan(inp, target_width=0.5 * plan(inp).floor_width)
    assert p.users_for_width is None
    target = 1.5 * p.floor_width
    p = plan(inp, target_width=target)
    assert plan(inp.with_users(p.users_for_width)).width == pytest.approx(target, rel=1e-6)


def test_pooling_narrows_and_complete_pooling_limit():
    base = dict(users=2e5, placebos=4, lift_sd=0.05)
    one = plan(PlanInputs(campaigns=1, **base)).width
    many = plan(PlanInputs(campaigns=20, **base)).width
    assert many < one
    # normal-normal posterior variance with mu unknown: V(1-B) + B^2 (V + tau^2)/J (BDA3 section 5.4);
    # with tau -> 0 and no bias it tends to V / J (complete pooling)
    v = variance_parts(PlanInputs(users=2e5, **NO_BIAS))["pooled"]
    pooled = variance_parts(PlanInputs(users=2e5, lift_sd=1e-6, **{**NO_BIAS, "campaigns": 9}))["pooled"]
    assert pooled == pytest.approx(v / 9, rel=1e-6)


def test_width_curve_is_monotone_per_placebo_count():
    c = width_curve(PlanInputs(), np.logspace(3, 8, 12), placebo_counts=(1, 4, 16))
    for _, g in c.groupby("placebos"):
        assert np.all(np.diff(g["width"].to_numpy()) < 0)
        assert (g["width"] >= g["floor_width"] - 1e-12).all()


@pytest.mark.slow  # simulated data sets fitted one by one (CI runs it)
@pytest.mark.parametrize("kw", [
    dict(users=50_000, **NO_BIAS),
    dict(users=400_000, bias_sd=0.0, residual_sd=0.05, placebos=12, bias_mean=0.2),
])
def test_simulation_through_quick_mode_agrees_with_analytic(kw):
    # Simulated data sets fitted with the quick mode (known truth) against the analytic width.
    inp = PlanInputs(baseline_rate=0.01, lift=0.1, **kw)
    p = plan(inp)
    sim = simulate_plan(inp, n_sims=60, seed=3, n_draws=800)
    assert sim["mean_width"] == pytest.approx(p.width, rel=0.10)
    # the share of intervals excluding zero is a Binomial(60) draw around the analytic probability
    assert abs(sim["excludes_zero"] - p.prob_excludes_zero) < 3.5 * np.sqrt(p.prob_excludes_zero
                                                                           * (1 - p.prob_excludes_zero) / 60) + 0.02
    assert sim["coverage"] >= 0.8


@pytest.mark.slow  # simulated data sets fitted one by one (CI runs it)
def test_simulation_shows_the_floor():
    # at 100x the users the simulated width stays near the analytic floor instead of shrinking 10x
    inp = PlanInputs(users=4e7, baseline_rate=0.01, lift=0.1, bias_sd=0.0, residual_sd=0.05, placebos=12)
    sim = simulate_plan(inp, n_sims=40, seed=5, n_draws=800)
    p = plan(inp)
    assert sim["mean_width"] == pytest.approx(p.width, rel=0.15)
    assert sim["mean_width"] > 0.8 * p.floor_width


def test_bad_plan_inputs_have_exact_messages():
    with pytest.raises(ConfigError) as e:
        PlanInputs(seen_share=1.5)
    assert str(e.value).startswith("plan input 'seen_share' is out of range: 1.5")
    with pytest.raises(ConfigError) as e:
        PlanInputs(placebos=0)
    assert "needs at least one placebo outcome" in str(e.value)
    with pytest.raises(ConfigError) as e:
        PlanInputs.from_mapping({"userz": 10})
    assert "userz" in str(e.value) and "users" in str(e.value)


def test_plan_cli_writes_folder_and_reuses_a_fit(tmp_path):
    from liftpool.cli import main

    out = tmp_path / "plan"
    assert main(["plan", "--users", "300000", "--placebos", "6", "--power", "0.8", "--target-width", "0.3",
                 "--out", str(out), "-q"]) == 0
    doc = json.loads((out / "plan.json").read_text())
    assert doc["inputs"]["users"] == 300000 and doc["assumptions"]
    p = plan(PlanInputs(users=300000, placebos=6), target_width=0.3, power=0.8)
    assert doc["width"] == pytest.approx(p.width, rel=1e-12)
    assert (out / "width_vs_users.png").read_bytes()[:4] == b"\x89PNG"
    assert main(["plan", "--users", "300000", "--out", str(out), "-q"]) == 2  # never written over
    assert main(["plan", "--seen-share", "2", "-q"]) == 2


def test_plan_reuses_a_fit_and_the_workspace_command(small_scenario, tmp_path):
    from liftpool.cli import main
    from liftpool.data_prep import prepare_counts
    from liftpool.models import ModelSettings, fit_counts, plan_inputs_from_fit

    p = small_scenario
    counts = prepare_counts(p["impressions"], p["conversions"], p["outcomes"], users=p["users"]).counts
    fit = fit_counts(counts, ModelSettings(seed=3), quick=True)
    inp = plan_inputs_from_fit(fit, users=1e6)
    post = fit.idata.posterior
    # the quick mode has one bias distribution: its spread becomes the residual spread
    assert inp.residual_sd == pytest.approx(float(post["bias_sd"].mean()), rel=1e-12)
    assert inp.bias_sd == 0 and inp.campaigns == fit.idata.posterior.sizes["campaign"]
    assert inp.lift_sd == pytest.approx(float(post["lift_sd"].mean()), rel=1e-12)
    assert inp.users == 1e6 and inp.source == "quick fit posterior means"
    camp = str(post.campaign.values[0])
    one = plan_inputs_from_fit(fit, campaign=camp)
    cd = fit.idata.constant_data
    assert one.users == float(cd["users_seen"].sel(campaign=camp) + cd["users_unseen"].sel(campaign=camp))

    from liftpool.workspace import Workspace

    ws = Workspace.init(tmp_path / "ws", p["impressions"], [p["conversions"]], [p["outcomes"]], users=p["users"])
    assert main(["prepare", str(ws.path), "-q"]) == 0
    assert main(["fit", str(ws.path), "--quick", "-q"]) == 0
    out = tmp_path / "plan"
    assert main(["plan", str(ws.path), "--campaign", camp, "--out", str(out), "-q"]) == 0
    doc = json.loads((out / "plan.json").read_text())
    assert doc["inputs"]["source"] == "quick fit posterior means"
    assert main(["plan", str(ws.path), "--campaign", "no-such-campaign", "-q"]) == 2


def test_tests_needed_for_an_excess_width():
    # the excess bias's mean after k tests is an inverse-variance average; with a flat prior its variance is
    # statsmodels' fixed-effect variance (reference: statsmodels.stats.meta_analysis.combine_effects)
    from statsmodels.stats.meta_analysis import combine_effects

    from liftpool.models.planning import (
        PlanInputs,
        _test_variance,
        _z,
        excess_width,
        plan,
        tests_for_excess_width,
    )

    inp = PlanInputs(excess_mean_scale=1e6, test_se=0.04)
    v = _test_variance(inp)
    res = combine_effects(np.array([0.1, -0.2, 0.05, 0.3, 0.0, 0.12]), np.full(6, v))
    assert excess_width(inp, 6) == pytest.approx(2 * _z(0.9) * res.sd_eff_w_fe, rel=1e-9)
    inp = PlanInputs(test_se=0.04)
    k = tests_for_excess_width(inp, 0.15)
    assert excess_width(inp, k) <= 0.15 < excess_width(inp, k - 1)
    assert tests_for_excess_width(inp, 10.0) == 0  # the prior alone is that narrow
    p = plan(inp, excess_target_width=0.15)
    assert p.tests_for_excess_width == k and "randomized tests for an excess-bias width" in p.render()
