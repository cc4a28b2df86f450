"""Tipping points and the E-value, against analytic cases (normal draws) and the published formula."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats
from scipy.special import expit, logit

from liftpool.models.estimands import add_money
from liftpool.models.sensitivity import e_value, sensitivity_curve, shifted_lift, tipping_points


def test_e_value_against_the_published_formula():
    # VanderWeele & Ding 2017 (Annals of Internal Medicine 167(4)), ../shared/references.md:
    # E = RR + sqrt(RR (RR - 1)); RR 3.9 gives 7.26 (check value computed from their formula)
    assert float(e_value(3.9)) == pytest.approx(7.26, abs=0.005)
    # below 1 the formula is applied to 1 / RR (same source)
    assert float(e_value(0.5)) == pytest.approx(2 + np.sqrt(2))
    assert float(e_value(1.0)) == pytest.approx(1.0)


def _estimands(lifts: np.ndarray, n: float = 10_000.0, p_seen: float = 0.03) -> xr.Dataset:
    """One cell per campaign: seen users convert at p_seen; the lift (log odds) of each draw is given."""
    D, C = lifts.shape
    S = np.full((D, C), n * p_seen)
    cf = n * expit(logit(p_seen) - lifts)
    units = [f"c{i}" for i in range(C)] + ["(portfolio)"]
    inc = np.concatenate([S - cf, (S - cf).sum(1, keepdims=True)], axis=1)
    cfa = np.concatenate([cf, cf.sum(1, keepdims=True)], axis=1)
    ds = xr.Dataset({"incremental_conversions": (("chain", "draw", "unit"), inc[None]),
                     "counterfactual_conversions": (("chain", "draw", "unit"), cfa[None]),
                     "lift": (("chain", "draw", "unit"), (inc / cfa)[None])},
                    coords={"chain": [0], "draw": np.arange(D), "unit": units,
                            "kind": ("unit", ["campaign"] * C + ["portfolio"])})
    ds["users_seen"] = ("unit", np.array([n] * C + [n * C]))
    return ds


def test_campaign_tipping_points_are_the_lift_quantiles_in_the_analytic_case():
    # one cell: the extra bias that brings a draw's lift to 0 is exactly that draw's lift (log odds), so the
    # tipping points are the lift's quantiles; reference: scipy.stats.norm.ppf of the draws' normal
    rng = np.random.default_rng(0)
    m, s = 0.15, 0.05
    ds = _estimands(rng.normal(m, s, (40_000, 1)))
    t = tipping_points(ds, 0.9, residual_sd=0.05).set_index("campaign")
    assert t.loc["c0", "tip_interval"] == pytest.approx(stats.norm.ppf(0.05, m, s), abs=0.003)
    assert t.loc["c0", "tip_positive"] == pytest.approx(m, abs=0.002)
    assert t.loc["c0", "tip_interval_spreads"] == pytest.approx(t.loc["c0", "tip_interval"] / 0.05)
    # a campaign whose interval already includes 0 has a negative tipping point
    t2 = tipping_points(_estimands(rng.normal(0.02, 0.05, (40_000, 1))), 0.9).set_index("campaign")
    assert t2.loc["c0", "tip_interval"] < 0 < t2.loc["c0", "tip_positive"]


def test_shifting_by_the_tipping_point_puts_the_lower_end_at_zero():
    rng = np.random.default_rng(1)
    ds = _estimands(rng.normal([0.1, 0.2], [0.04, 0.06], (20_000, 2)))
    t = tipping_points(ds, 0.9).set_index("campaign")
    for u in ("c0", "c1", "(portfolio)"):
        x = shifted_lift(ds, u, t.loc[u, "tip_interval"])
        assert np.quantile(x, 0.05) == pytest.approx(0.0, abs=2e-3)
        x = shifted_lift(ds, u, t.loc[u, "tip_positive"])
        assert np.mean(x > 0) == pytest.approx(0.5, abs=0.01)
    # no shift: the stored lift
    assert np.allclose(shifted_lift(ds, "c0", 0.0), ds["lift"].values[0, :, 0])
    c = sensitivity_curve(ds, "(portfolio)", 0.9, [0.0, 0.1, 0.2])
    assert (np.diff(c["median"]) < 0).all() and (c["lower"] < c["median"]).all()


def test_paid_tipping_point():
    # paying for itself: incremental conversions x value > spend. At the tipping point the chance is one half
    rng = np.random.default_rng(2)
    ds = _estimands(rng.normal(0.2, 0.05, (20_000, 1)))
    inc = ds["incremental_conversions"].values[0, :, 0]
    spend = pd.DataFrame({"campaign": ["c0"], "spend": [float(np.median(inc)) * 0.6 * 50.0],
                          "value_per_conversion": [50.0]})
    m = add_money(ds, spend)
    t = tipping_points(m, 0.9).set_index("campaign")
    tip = t.loc["c0", "tip_paid"]
    assert 0 < tip < t.loc["c0", "tip_positive"]
    inc2 = ds["incremental_conversions"].values[0, :, 0] + ds["counterfactual_conversions"].values[0, :, 0] - \
        10_000 * expit(logit(ds["counterfactual_conversions"].values[0, :, 0] / 10_000) + tip)
    assert np.mean(inc2 * 50.0 > spend["spend"][0]) == pytest.approx(0.5, abs=0.01)


def test_tipping_sentences():
    from types import SimpleNamespace

    from liftpool.reports.text import tipping_sentence

    t = SimpleNamespace(residual_sd=0.05, excess={})
    s = tipping_sentence({"tip_interval": 0.12, "tip_positive": 0.2, "tip_paid": 0.004}, t)
    assert "holds unless its target's own bias exceeds the placebos' by more than 0.12 on the log-odds scale" in s
    assert "2.4 times the spread of the bias between outcomes" in s and "above 0.004" in s
    s = tipping_sentence({"tip_interval": -0.05, "tip_positive": 0.1, "tip_paid": -0.2}, t)
    assert s.startswith(" A positive lift is more likely than not unless") and "paid" not in s
    t = SimpleNamespace(residual_sd=None, excess={"excess_mean": {}})
    s = tipping_sentence({"tip_interval": 0.3, "tip_positive": 0.4, "tip_paid": float("nan")}, t)
    assert "what the placebos and the randomized tests show" in s and "spread" not in s


def test_portfolio_paid_tipping_point_weighs_each_campaign_by_its_value():
    # two campaigns with different values per conversion: at the portfolio's tipping point, the revenue
    # summed at each campaign's own value pays for the total spend in half of the draws
    rng = np.random.default_rng(3)
    ds = _estimands(rng.normal([0.2, 0.1], [0.05, 0.04], (20_000, 2)))
    inc = ds["incremental_conversions"].values[0, :, :2]
    values = np.array([10.0, 200.0])
    total = float(np.median(inc @ values)) * 0.7
    spend = pd.DataFrame({"campaign": ["c0", "c1"], "spend": [total / 2, total / 2], "value_per_conversion": values})
    t = tipping_points(add_money(ds, spend), 0.9).set_index("campaign")
    tip = t.loc["(portfolio)", "tip_paid"]
    S = inc + ds["counterfactual_conversions"].values[0, :, :2]
    cf = ds["counterfactual_conversions"].values[0, :, :2]
    cf2 = 10_000 * expit(logit(cf / 10_000) + tip)
    assert np.mean((S - cf2) @ values > total) == pytest.approx(0.5, abs=0.01)
