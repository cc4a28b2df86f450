"""Property: every counts table `validate_counts` accepts fits in quick mode without error (random
invented tables: shapes, zeros, tiny and one-sided cells, missing placebos, an unexposed arm)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from liftpool.data_prep import InputError, validate_counts
from liftpool.models import ModelSettings, fit_counts


@st.composite
def counts_tables(draw):
    rows = []
    n_camp = draw(st.integers(1, 4))
    for c in range(n_camp):
        n_pl = draw(st.integers(0, 2))
        outcomes = [(f"t{c}", "target")] + [(f"p{j}", "placebo") for j in range(n_pl)]
        for k in range(draw(st.integers(1, 3))):
            arms = draw(st.sampled_from([("seen", "unseen")] * 3 + [("seen", "unseen", "unexposed"), ("seen",), ("unseen",)]))
            for arm in arms:
                users = draw(st.integers(0, 5000))
                for o, role in outcomes:
                    conv = draw(st.integers(0, users)) if users else 0
                    if draw(st.booleans()) and users:  # many tables are sparse: often no conversion at all
                        conv = min(conv, draw(st.integers(0, 3)))
                    rows.append((f"camp{c}", f"cell{k}", arm, o, role, users, conv))
    return pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(counts_tables())
def test_every_accepted_table_fits_in_quick_mode(counts):
    try:
        ok = validate_counts(counts, "counts")
    except InputError:
        return  # refused with a clear message: fine
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_counts(ok, ModelSettings(seed=1), quick=True)
    s = fit.summary
    main = "lift" if fit.corrected else "lift_uncorrected"
    got = s[(s["quantity"] == main) & (s["kind"] == "campaign")]
    assert set(got["campaign"]) == set(ok["campaign"])
    assert np.isfinite(got[["median", "lower", "upper"]].to_numpy()).all()
    assert (got["lower"] <= got["median"]).all() and (got["median"] <= got["upper"]).all()
