"""The shape suite: the default full fit converges on every shape a portfolio may have, and its
90% lift intervals cover the known truth (invented counts from data_prep/shapes.py: simulations).

Convergence thresholds are Vehtari et al. 2021 (Bayesian Analysis 16(2)): rank R-hat <= 1.01, bulk
and tail ESS >= 400, no divergences.  The oracle is the same model with the true spreads fixed
(models/calibration.py: oracle_lift).  The fuller run (3 seeds per shape, coverage 85-95%) is
validation/shapes.py, results in docs/validation.md; here one seed per shape, so the coverage
band is wider (about 60 intervals: a binomial standard deviation near 4%).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from liftpool.data_prep.shapes import SHAPES, shape_counts
from liftpool.models import ModelSettings, fit_counts
from liftpool.models.calibration import oracle_lift

SEED = 11


@pytest.fixture(scope="module")
def suite():
    out = {}
    for name, sh in SHAPES.items():
        counts, truth = shape_counts(sh, SEED)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a non-convergence warning: the tests below check each fit
            fit = fit_counts(counts, ModelSettings())
        oracle = oracle_lift(counts, {"bias_sd": sh.bias_sd, "residual_sd": sh.residual_sd, "lift_sd": sh.lift_sd},
                             seed=SEED).set_index("campaign")
        out[name] = (fit, truth.set_index("campaign"), oracle)
    return out


@pytest.mark.slow
@pytest.mark.parametrize("name", list(SHAPES))
def test_default_full_fit_converges(suite, name):
    fit, _, _ = suite[name]
    checks = {c.name: c for c in fit.diagnostics.checks}
    assert checks["R-hat (rank-normalized)"].value <= 1.01, fit.diagnostics.render()
    assert checks["bulk ESS"].value >= 400 and checks["tail ESS"].value >= 400, fit.diagnostics.render()
    assert checks["divergences after tuning"].value == 0, fit.diagnostics.render()
    assert fit.converged


@pytest.mark.slow
def test_spreads_mix(suite):
    # every spread mixes: bulk ESS per draw at least 25% typically (median over shapes and spreads)
    # and never below 15% (a spread the data barely inform, e.g. residual_sd of one campaign with
    # three placebos, measured 0.19 at worst in validation/shapes.py; docs/validation.md)
    import arviz as az

    per = []
    for name, (fit, _, _) in suite.items():
        post = fit.idata.posterior
        n = post.sizes["chain"] * post.sizes["draw"]
        for v in ("residual_sd", "bias_sd", "lift_sd"):
            if v in post:
                per.append((float(az.ess(post[v].values)) / n, name, v))
    assert min(per)[0] >= 0.15, min(per)
    assert np.median([p[0] for p in per]) >= 0.25, sorted(per)[:5]


@pytest.mark.slow
def test_coverage_and_width_against_the_oracle(suite):
    covered, n, ratio = 0, 0, []
    for _name, (fit, truth, oracle) in suite.items():
        lift = fit.table("lift_logodds")
        t = truth.loc[lift.index, "lift_logodds"]
        covered += int(((lift["lower"] <= t) & (t <= lift["upper"])).sum())
        n += len(t)
        ratio.append(float((lift["upper"] - lift["lower"]).mean() / (oracle["upper"] - oracle["lower"]).mean()))
    assert n >= 50
    assert 0.78 <= covered / n <= 0.99, (covered, n)
    # the fuller run (3 seeds per shape) measured 1.18 (docs/validation.md); one seed per shape is
    # noisier (measured 1.35 at this seed: the null-lift shape's oracle knows lift_sd = 0), so the
    # band here is wider; a model that ignored its data's information would be far outside it
    assert np.mean(ratio) <= 1.45, ratio
