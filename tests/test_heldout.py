"""Held-out checks: each placebo predicted without itself (importance-weighted) against an exact refit, and
their coverage on known truth (simulations, data_prep/shapes.py)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from liftpool.data_prep.shapes import scaled, shape_counts
from liftpool.models import ModelSettings, fit_counts
from liftpool.models.conditional import build_curves, cell_tables
from liftpool.models.design import make_design
from liftpool.models.evidence import campaign_tests
from liftpool.models.gaussian import gaussian_posterior
from liftpool.models.heldout import _observations, _population, _predict, heldout_checks


def test_importance_weighted_placebo_matches_an_exact_refit():
    # the reference is the same prediction from a posterior refitted without the placebo (the quick mode's
    # exact grid posterior); Pareto-smoothed importance sampling (Vehtari, Gelman & Gabry 2017) must agree
    counts, _ = shape_counts(scaled("few_cells", campaigns=6, placebos=2), 4)
    s = ModelSettings()
    d = make_design(counts)
    curves = build_curves(cell_tables(d), len(d.pair_campaign))
    se = np.where(curves.informative, 1.0 / np.sqrt(np.maximum(curves.information, 1e-300)), np.inf)
    none = campaign_tests(d.campaigns, None)
    full = gaussian_posterior(curves.mode, se, curves.informative, d.pair_campaign, d.target_pair(), s, 4000,
                              np.random.default_rng(0))
    got = heldout_checks(d, curves, full, s, none, None, 0.9, max_draws=4000)
    c = 2
    p = int(np.flatnonzero((d.pair_campaign == c) & ~d.pair_is_target)[0])
    row = got[(got["campaign"] == d.campaigns[c]) & (got["item"] == d.outcomes[d.pair_outcome[p]])].iloc[0]
    inf = curves.informative.copy()
    inf[p] = False
    refit = gaussian_posterior(curves.mode, se, inf, d.pair_campaign, d.target_pair(), s, 4000,
                               np.random.default_rng(1))
    refit = {k: v for k, v in refit.items() if isinstance(v, np.ndarray)}
    pop = _population(d, refit, s, 4000)
    obs = _observations(d, curves, c, pop, None, none)
    i = [j for j, o in enumerate(obs) if o[1] == p][0]
    exact = _predict(d, c, obs, i, pop, 0.9, p, curves, None, None, importance=False)
    assert row["pareto_k"] < 0.7
    for k in ("lower", "median", "upper"):
        assert row[k] == pytest.approx(exact[k], abs=0.015), k
    assert row["pit"] == pytest.approx(exact["pit"], abs=0.03)


def test_placebo_heldout_coverage_is_near_nominal_on_known_truth():
    # the placebos share their campaign's bias up to residual_sd, as the model assumes: about 90% of them
    # should fall inside their 90% held-out interval (5 portfolios x 8 campaigns x 3 placebos = 120)
    rows = []
    for seed in range(5):
        counts, _ = shape_counts("few_cells", seed)
        fit = fit_counts(counts, ModelSettings(), quick=True)
        rows.append(fit.heldout[fit.heldout["kind"] == "placebo"])
    h = pd.concat(rows)
    assert len(h) == 120
    assert 0.8 <= h["covered"].mean() <= 0.98
    assert (h["pareto_k"] < 0.7).mean() > 0.9
    # the PIT values spread over (0, 1) rather than piling at the ends
    assert 0.3 < h["pit"].mean() < 0.7


def test_mixture_quantiles_against_root_finding():
    # reference: scipy.optimize.brentq on the mixture's CDF built from scipy.stats.norm.cdf
    from scipy import optimize, stats

    from liftpool.models.heldout import _batch_quantiles

    rng = np.random.default_rng(0)
    W = rng.dirichlet(np.ones(300), size=3)
    MU, SD = rng.normal(0, 1, (3, 300)), rng.uniform(0.05, 1.0, (3, 300))
    probs = np.array([0.5, 0.05, 0.95, 0.001])
    Q = _batch_quantiles(W, MU, SD, probs)
    for i in range(3):
        for j, q in enumerate(probs):
            ref = optimize.brentq(lambda x: (W[i] * stats.norm.cdf(x, MU[i], SD[i])).sum() - q, -30, 30, xtol=1e-12)  # noqa: B023
            assert Q[i, j] == pytest.approx(ref, abs=1e-7)
