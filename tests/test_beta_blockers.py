"""The default full model on the beta-blocker trials against BDA3's published hierarchical analysis.

Gelman et al., Bayesian Data Analysis, 3rd ed., Table 5.4 data and Table 5.5 results (the vetted values
are in ../shared/references.md): with a uniform prior on tau, mu has median -0.25 (95% -0.37 to -0.11)
and tau median 0.13.  Each trial is a campaign with one cell and no placebo (so only the uncorrected
lift exists), treated = seen, control = unseen; wide priors stand in for BDA3's flat ones.  BDA3 uses
the normal approximation of each trial's log odds ratio, this model each table's exact conditional
likelihood, so the agreement is to the published two decimals, not closer.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from liftpool.models import ModelSettings, fit_counts

pytestmark = pytest.mark.slow  # an MCMC fit

# control deaths/total, treated deaths/total (BDA3 Table 5.4)
TRIALS = [(3, 39, 3, 38), (14, 116, 7, 114), (11, 93, 5, 69), (127, 1520, 102, 1533), (27, 365, 28, 355),
          (6, 52, 4, 59), (152, 939, 98, 945), (48, 471, 60, 632), (37, 282, 25, 278), (188, 1921, 138, 1916),
          (52, 583, 64, 873), (47, 266, 45, 263), (16, 293, 9, 291), (45, 883, 57, 858), (31, 147, 25, 154),
          (38, 213, 33, 207), (12, 122, 28, 251), (6, 154, 8, 151), (3, 134, 6, 174), (40, 218, 32, 209),
          (43, 364, 27, 391), (39, 674, 22, 680)]


def test_beta_blocker_hierarchy_matches_bda3():
    rows = []
    for i, (xc, nc, xt, nt) in enumerate(TRIALS):
        rows += [(f"trial{i:02d}", "all", "seen", "death", "target", nt, xt),
                 (f"trial{i:02d}", "all", "unseen", "death", "target", nc, xc)]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    fit = fit_counts(counts, ModelSettings(lift_mean_scale=10.0, lift_sd_scale=2.0, seed=3, draws=2000))
    assert fit.converged, fit.diagnostics.render()
    mu = fit.idata.posterior["lift_mean"].values.ravel()
    tau = fit.idata.posterior["lift_sd"].values.ravel()
    lo, med, hi = np.quantile(mu, [0.025, 0.5, 0.975])
    assert abs(med - (-0.25)) <= 0.02, med
    assert abs(lo - (-0.37)) <= 0.03 and abs(hi - (-0.11)) <= 0.03, (lo, hi)
    assert abs(np.median(tau) - 0.13) <= 0.03, np.median(tau)
