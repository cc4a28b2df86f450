"""The full PyMC model: outside references, known truth, flags, storage.  Small models, fixed seeds."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from liftpool.data_prep import CountingRules, prepare_counts, simulate
from liftpool.models import ModelSettings, fit_counts, load_fit
from liftpool.models.errors import InputError

pytestmark = pytest.mark.slow  # full MCMC fits

COLS = ["campaign", "cell", "arm", "outcome", "role", "users", "conversions"]
FAST = ModelSettings(draws=500, tune=500, seed=5)


def counts_of(rows):
    return pd.DataFrame(rows, columns=COLS)


BETA_ROWS = [("solo", "all", "seen", "buy", "target", 20_000, 500),
             ("solo", "all", "unseen", "buy", "target", 20_000, 400)]


@pytest.fixture(scope="module")
def beta_fit():
    # the Binomial reference model (its start logic is tested below)
    s = ModelSettings(draws=1000, tune=1000, seed=1, lift_mean_scale=10.0, likelihood="binomial")
    return fit_counts(counts_of(BETA_ROWS), s)


def assert_matches_conjugate_beta(fit, seed):
    # one campaign, one cell, no placebo, near-flat priors: the seen/unseen rate ratio matches the
    # ratio of independent Beta(1 + x, 1 + n - x) posteriors (scipy.stats.beta), 200,000 Monte Carlo draws
    rng = np.random.default_rng(seed)
    ref = (stats.beta(501, 19_501).rvs(200_000, random_state=rng)
           / stats.beta(401, 19_601).rvs(200_000, random_state=rng) - 1)
    got = fit.idata.posterior["lift_uncorrected"].values.ravel()
    np.testing.assert_allclose(np.quantile(got, [0.05, 0.5, 0.95]), np.quantile(ref, [0.05, 0.5, 0.95]),
                               atol=0.015)
    assert fit.converged, fit.diagnostics.render()


def test_single_cell_matches_conjugate_beta(beta_fit):
    assert_matches_conjugate_beta(beta_fit, seed=0)


def test_conditional_single_cell_matches_conjugate_beta():
    # the default model conditions on the cell's total, then completes the rates: same posterior
    fit = fit_counts(counts_of(BETA_ROWS), ModelSettings(seed=4, lift_mean_scale=10.0))
    assert fit.info["likelihood"] == "conditional"
    assert_matches_conjugate_beta(fit, seed=3)


def test_advi_start_matches_conjugate_beta():
    # the chains started from ADVI: the start changes where sampling begins, never the posterior
    s = ModelSettings(draws=1000, tune=500, seed=2, lift_mean_scale=10.0, init="advi+adapt_diag",
                      advi_iterations=5000, likelihood="binomial")
    fit = fit_counts(counts_of(BETA_ROWS), s)
    assert fit.info["init"] == "advi+adapt_diag"
    assert_matches_conjugate_beta(fit, seed=1)


def test_auto_start_follows_model_size(beta_fit):
    from liftpool.models.fit import AUTO_ADVI_FROM, choose_init

    auto = ModelSettings()
    assert choose_init(AUTO_ADVI_FROM - 1, auto) == "jitter+adapt_diag"
    assert choose_init(AUTO_ADVI_FROM, auto) == "advi+adapt_diag"
    assert choose_init(10, ModelSettings(init="advi+adapt_diag")) == "advi+adapt_diag"
    assert choose_init(10**6, ModelSettings(init="jitter+adapt_diag")) == "jitter+adapt_diag"
    assert beta_fit.info["init"] == "jitter+adapt_diag" and beta_fit.info["free_parameters"] == 2  # the baseline and the lift


def test_failed_advi_start_falls_back_and_says_so(monkeypatch):
    import pymc as pm

    real = pm.sample
    seen = []

    def sample(*args, **kwargs):
        seen.append(kwargs["init"])
        if kwargs["init"] == "advi+adapt_diag":
            raise FloatingPointError("NaN occurred in optimization.\nmore detail")
        return real(*args, **kwargs)

    monkeypatch.setattr(pm, "sample", sample)
    rows = [("solo", "all", "seen", "buy", "target", 2_000, 50),
            ("solo", "all", "unseen", "buy", "target", 2_000, 40)]
    notes = []
    fit = fit_counts(counts_of(rows), ModelSettings(draws=200, tune=200, chains=2, seed=3, init="advi+adapt_diag",
                                                    likelihood="binomial"),
                     progress=notes.append)
    assert seen == ["advi+adapt_diag", "jitter+adapt_diag"]
    assert fit.info["init"] == "jitter+adapt_diag"
    assert fit.info["init_fallback"] == "ADVI failed: NaN occurred in optimization."
    assert any("starting with jitter+adapt_diag" in n for n in notes)


def test_no_placebo_anywhere_refuses_corrected_lift(beta_fit):
    q = set(beta_fit.summary["quantity"])
    assert "lift_uncorrected" in q and "lift" not in q and "p_lift_positive" not in q
    assert beta_fit.flags.no_placebo_anywhere and beta_fit.flags.single_campaign
    msgs = " ".join(beta_fit.flags.messages())
    assert "no bias-corrected lift" in msgs and "single campaign" in msgs.lower()


@pytest.fixture(scope="module")
def demo_fit():
    # the demo scenario with its two randomized tests: one campaign's target has a bias its placebos
    # do not show (an excess), which the tests reveal (data_prep/simulate.py)
    from liftpool.data_prep.experiments import check_experiments

    data = simulate(seed=21, scale=0.6)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"],
                         rules=CountingRules(unexposed=True))
    fit = fit_counts(res.counts, ModelSettings(seed=21), experiments=check_experiments(data["experiments"]))
    return fit, data["truth"].set_index("campaign")


def test_full_model_converges_on_demo(demo_fit):
    fit, _ = demo_fit
    assert fit.converged, fit.diagnostics.render()


def test_full_model_recovers_known_truth(demo_fit):
    fit, truth = demo_fit
    lift = fit.table("lift")
    unc = fit.table("lift_uncorrected")
    naive = fit.table("lift_naive")
    t = truth.loc[lift.index, "true_lift"]
    covered = (lift["lower"] <= t) & (t <= lift["upper"])
    # 90% intervals on 8 campaigns: at least 6 covered has probability 0.96 (binomial, scipy.stats.binom.sf(5,
    # 8, 0.9)); the tests' own noise moves the tested campaigns' intervals too
    assert covered.sum() >= 6, pd.concat([lift[["lower", "median", "upper"]], t], axis=1)
    # the uncorrected estimate is visibly biased and the naive one wildly so (known truth of the simulator);
    # the corrected error left (about 0.10 here) is mostly pooling of 8 campaigns toward their mean, and the
    # two tests' excess (large on one campaign, none on the other) applied to every campaign alike
    assert (unc["median"] - t).mean() > 2.0 * (lift["median"] - t).abs().mean()
    assert (naive["median"] > 3 * t.clip(lower=0.05)).all()
    inc = fit.table("incremental_conversions")
    tin = truth.loc[inc.index, "true_incremental_conversions"]
    assert ((inc["lower"] <= tin) & (tin <= inc["upper"])).sum() >= 6


def test_no_placebo_campaign_borrows_bias(demo_fit):
    fit, _ = demo_fit
    assert fit.flags.no_placebo == ["compost-kits"]
    b = fit.table("bias")
    # the borrowed bias sits inside the spread of the others
    others = b.drop(index="compost-kits")["median"]
    assert others.min() - 0.1 <= b.loc["compost-kits", "median"] <= others.max() + 0.1


def test_summary_shape_and_pooled_rows(demo_fit):
    fit, _ = demo_fit
    s = fit.summary
    assert list(s.columns) == ["campaign", "kind", "quantity", "mean", "median", "lower", "upper", "level"]
    for q in ("lift", "lift_uncorrected", "lift_naive", "incremental_conversions", "bias", "p_lift_positive"):
        assert (s.quantity == q).sum() >= 8, q
    assert {"(portfolio)", "(new campaign)"} <= set(s.campaign)
    assert (s.level == 0.9).all()
    p = fit.table("p_lift_positive")["mean"]
    post = fit.idata.posterior["lift"]
    for c in p.index:  # recomputed independently from the draws
        assert p[c] == pytest.approx(float((post.sel(campaign=c) > 0).mean()))


def test_save_load_roundtrip_and_no_overwrite(demo_fit, tmp_path):
    fit, _ = demo_fit
    out = fit.save(tmp_path / "fit1")
    assert sorted(p.name for p in out.iterdir()) == ["estimands.nc", "fit.json", "heldout_check.csv", "posterior.nc",
                                                     "predictive_check.csv", "summary.csv", "tests.csv"]
    back = load_fit(out)
    pd.testing.assert_frame_equal(back.tests, fit.tests, check_dtype=False)
    pd.testing.assert_frame_equal(back.heldout, fit.heldout, check_dtype=False)
    pd.testing.assert_frame_equal(back.summary, fit.summary)
    np.testing.assert_allclose(back.estimands["lift"].values, fit.estimands["lift"].values, rtol=0, atol=0)
    pd.testing.assert_frame_equal(back.summarize(0.5), fit.summarize(0.5))
    pd.testing.assert_frame_equal(back.predictive, fit.predictive, check_dtype=False)
    assert list(back.idata.posterior["lift"].campaign.values) == list(fit.idata.posterior.campaign.values)
    assert json.loads((out / "fit.json").read_text())["settings"]["seed"] == 21
    before = (out / "posterior.nc").read_bytes()
    with pytest.raises(InputError, match="never written over"):
        fit.save(out)
    assert (out / "posterior.nc").read_bytes() == before


def test_zero_lift_intervals_include_zero():
    data = simulate(seed=33, scale=0.5, zero_lift=True)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"])
    fit = fit_counts(res.counts, ModelSettings(seed=33))
    lift = fit.table("lift")
    assert ((lift["lower"] <= 0) & (0 <= lift["upper"])).mean() >= 0.8, lift


def test_zero_conversion_arm_fits_and_is_flagged():
    rows = []
    for c, (xs, xu) in {"big": (300, 200), "tiny": (4, 0)}.items():
        n = 10_000 if c == "big" else 120
        rows += [(c, "all", "seen", "t_" + c, "target", n, xs), (c, "all", "unseen", "t_" + c, "target", n // 2, xu),
                 (c, "all", "seen", "pl", "placebo", n, xs // 2 + 1), (c, "all", "unseen", "pl", "placebo", n // 2, xu // 3)]
    fit = fit_counts(counts_of(rows), FAST)
    assert fit.flags.zero_conversions_arm == ["tiny"]
    assert np.isfinite(fit.table("lift").loc["tiny", ["lower", "upper"]]).all()


def test_diagnostics_fail_loudly_on_a_starved_fit():
    rows = [("a", "all", "seen", "t", "target", 1000, 30), ("a", "all", "unseen", "t", "target", 1000, 20),
            ("a", "all", "seen", "p", "placebo", 1000, 25), ("a", "all", "unseen", "p", "placebo", 1000, 20)]
    fit = fit_counts(counts_of(rows), ModelSettings(chains=1, draws=30, tune=30, seed=2))
    assert not fit.converged
    names = {c.name for c in fit.diagnostics.failures}
    assert "R-hat (rank-normalized)" in names and "bulk ESS" in names
    assert "at least 2 chains" in fit.diagnostics.render()
    assert "NOT converge" in fit.render()


def test_same_seed_same_result():
    rows = [("a", "all", "seen", "t", "target", 1000, 30), ("a", "all", "unseen", "t", "target", 1000, 20),
            ("a", "all", "seen", "p", "placebo", 1000, 25), ("a", "all", "unseen", "p", "placebo", 1000, 20),
            ("b", "all", "seen", "t2", "target", 800, 20), ("b", "all", "unseen", "t2", "target", 900, 15)]
    s = ModelSettings(draws=100, tune=100, seed=9)
    a, b = fit_counts(counts_of(rows), s), fit_counts(counts_of(rows), s)
    pd.testing.assert_frame_equal(a.summary, b.summary)


def test_posterior_predictive_check_covers_observed(demo_fit):
    fit, _ = demo_fit
    pc = fit.predictive
    assert pc is not None and len(pc) >= 16
    # observed totals by (campaign, outcome, arm) inside their 90% predictive interval about 90% of the time
    assert pc["inside"].mean() >= 0.8, pc[~pc["inside"]]
    q = fit.info["prior_predictive"]["lift_prior_quantiles"]
    assert q["q05"] < 0 < q["q95"]  # the priors alone allow a negative or positive lift (weakly informative)
    assert q["q95"] < 5  # ... but not wildly implausible ones


def test_ess_advice_says_how_many_draws():
    import arviz as az

    from liftpool.models.diagnostics import check_convergence, draws_needed

    # an AR(1) chain with coefficient 0.9 has ESS about n (1 - 0.9) / (1 + 0.9) (the standard formula for
    # the integrated autocorrelation time of an AR(1) process, from memory): 4 chains of 500 draws give
    # about 105, so about 4 x 400 / 105 x 1.2 = 1,900 draws per chain are suggested
    rng = np.random.default_rng(4)
    x = np.zeros((4, 500))
    for t in range(1, 500):
        x[:, t] = 0.9 * x[:, t - 1] + rng.standard_normal(4)
    idata = az.from_dict(posterior={"residual_sd": x}, sample_stats={"diverging": np.zeros((4, 500), bool)})
    diag = check_convergence(idata)
    bulk = next(c for c in diag.checks if c.name == "bulk ESS")
    assert not bulk.passed and 60 < bulk.value < 160
    assert f"about --draws {draws_needed(500, bulk.value)} per chain, from the ESS of 500 draws" in bulk.advice
    assert 1_200 <= draws_needed(500, bulk.value) <= 3_500
    assert draws_needed(500, 800.0) == 300 and draws_needed(500, 0.0) == 0


def test_sampling_says_how_far_it_is_and_keeps_pymc_internals_out(monkeypatch, caplog):
    # without a progress bar (output to a file, a scheduler): timestamped lines come from the progress
    # callback; PyMC's own lines (its parameter list) stay out
    import logging
    import warnings

    import liftpool.models.fit as fit_module
    from liftpool.data_prep.shapes import SHAPES, shape_counts

    monkeypatch.setattr(fit_module, "HEARTBEAT_SECONDS", 0.0)
    counts, _ = shape_counts(SHAPES["few_cells"], 1)
    lines = []
    with caplog.at_level(logging.INFO, logger="pymc"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit_counts(counts, ModelSettings(draws=100, tune=100, chains=2), progress=lines.append)
    beats = [ln for ln in lines if " iterations (" in ln]
    assert beats and beats[-1].startswith("sampling: ") and "of 400 iterations" in beats[-1]
    assert not [r for r in caplog.records if r.name.startswith("pymc") and "NUTS:" in r.getMessage()]
