"""Report tables: the fit's estimands summarised at the report's level, formatted nowhere else.

Every number comes from :mod:`liftpool.models.estimands` (draws of every reported quantity, the
pooled rows included) through its one summary function; this module only arranges the summary into
one row per unit (campaigns, then the portfolio and a new campaign) with machine-readable column
keys in natural units (fractions, conversions, money). :data:`COLUMNS` gives each key its printed
label and number kind, which the HTML, the XLSX and the text share.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr
from scipy import stats

from liftpool.data_prep.errors import InputError
from liftpool.models.estimands import (
    PROBABILITIES,
    USER_COUNTS,
    add_money,
    interval,
    placebo_summary,
    shrinkage_summary,
    summarize,
)
from liftpool.models.fit import FitResult
from liftpool.models.heldout import KHAT_LIMIT, level_columns
from liftpool.models.sensitivity import tipping_points
from liftpool.models.summary import NEW_CAMPAIGN, PORTFOLIO

__all__ = ["ReportTables", "build_tables", "interval", "COLUMNS", "label", "KIND_OF_ROW"]

#: column key: (printed label, number kind). ``{L}`` is the level in percent, ``{cur}`` the currency.
COLUMNS = {
    "campaign": ("campaign", "text"),
    "row": ("row", "text"),
    "users_seen": ("users seen", "int"),
    "users_unseen": ("users unseen", "int"),
    "target_conversions_seen": ("target conversions, seen users", "int"),
    "target_conversions_unseen": ("target conversions, unseen users", "int"),
    "nonviewable_share": ("non-viewable share of measured impressions", "share"),
    "lift_naive": ("naive lift (median)", "pct"),
    "lift_uncorrected": ("uncorrected lift (median)", "pct"),
    "lift_uncorrected_lower": ("uncorrected lift, {L}% lower", "pct"),
    "lift_uncorrected_upper": ("uncorrected lift, {L}% upper", "pct"),
    "lift": ("bias-corrected lift (median)", "pct"),
    "lift_lower50": ("lift, 50% lower", "pct"),
    "lift_upper50": ("lift, 50% upper", "pct"),
    "lift_lower": ("lift, {L}% lower", "pct"),
    "lift_upper": ("lift, {L}% upper", "pct"),
    "incremental_conversions": ("incremental conversions (median)", "count"),
    "incremental_conversions_lower": ("incremental conversions, {L}% lower", "count"),
    "incremental_conversions_upper": ("incremental conversions, {L}% upper", "count"),
    "p_lift_positive": ("P(lift > 0)", "prob"),
    "spend": ("spend ({cur})", "money"),
    "cost_per_incremental_conversion": ("cost per incremental conversion, median ({cur})", "money"),
    "cost_per_incremental_conversion_lower": ("cost per incremental conversion, {L}% lower ({cur})", "money"),
    "cost_per_incremental_conversion_upper": ("cost per incremental conversion, {L}% upper ({cur})", "money"),
    "incremental_revenue": ("incremental revenue, median ({cur})", "money"),
    "incremental_revenue_lower": ("incremental revenue, {L}% lower ({cur})", "money"),
    "incremental_revenue_upper": ("incremental revenue, {L}% upper ({cur})", "money"),
    "return_on_ad_spend": ("return on ad spend (median)", "ratio"),
    "return_on_ad_spend_lower": ("return on ad spend, {L}% lower", "ratio"),
    "return_on_ad_spend_upper": ("return on ad spend, {L}% upper", "ratio"),
    "p_paid_for_itself": ("P(paid for itself)", "prob"),
    "tip_interval": ("extra target bias that brings the {L}% lower end to 0 (log odds)", "logodds"),
    "tip_interval_spreads": ("... in outcome-to-outcome spreads", "spreads"),
    "tip_positive": ("extra target bias at which P(lift > 0) falls below 50% (log odds)", "logodds"),
    "tip_paid": ("extra target bias at which P(paid for itself) falls below 50% (log odds)", "logodds"),
    "e_value_interval": ("E-value of the {L}% lower end", "evalue"),
    "notes": ("notes", "text"),
}
#: The printed name of each kind of row.
KIND_OF_ROW = {"campaign": "campaign", "portfolio": "all campaigns", "new campaign": "a new campaign (predictive)"}


def label(key: str, level: float, currency: str) -> str:
    """The printed label of a column key at ``level`` and ``currency``."""
    return COLUMNS[key][0].format(L=int(round(level * 100)), cur=currency)


@dataclass
class ReportTables:
    """All tables of a report.

    Attributes
    ----------
    results : DataFrame
        One row per unit (campaigns, then the pooled rows), the :data:`COLUMNS` keys, natural units;
        ``inf`` marks a value that is not bounded (printed as such, written as an empty cell).
    summary : DataFrame
        The tidy summary of the estimands at ``level`` (with money when spend was given).
    estimands : Dataset
        The draws the summary came from (figures read their densities from it).
    """

    results: pd.DataFrame
    summary: pd.DataFrame
    estimands: xr.Dataset
    placebos: pd.DataFrame
    shrinkage: pd.DataFrame
    diagnostics: pd.DataFrame
    prep: pd.DataFrame | None
    settings: pd.DataFrame
    provenance: pd.DataFrame
    predictive: pd.DataFrame | None = None
    currency: str = "USD"
    level: float = 0.9
    predictive_level: float | None = None
    spend_given: bool = False
    lift_spread: dict = field(default_factory=dict)
    #: per unit: tipping points (:func:`liftpool.models.sensitivity.tipping_points`)
    tipping: pd.DataFrame | None = None
    #: the randomized tests beside the model's estimate without each (None without tests)
    tests: pd.DataFrame | None = None
    #: each placebo's estimate beside its prediction from the other data (leave-one-placebo-out)
    heldout_placebos: pd.DataFrame | None = None
    #: the excess bias's mean and spread (median, lower, upper) when learned; the residual_sd median
    excess: dict = field(default_factory=dict)
    residual_sd: float | None = None
    #: the level of the held-out intervals (the report's, or the fit's when it did not store the report's)
    heldout_level: float | None = None

    @property
    def campaigns(self) -> pd.DataFrame:
        """The campaign rows of :attr:`results`."""
        return self.results[self.results["row"] == "campaign"].reset_index(drop=True)

    def pooled(self, kind: str) -> dict | None:
        """The row of the portfolio (``"portfolio"``) or of a new campaign (``"new campaign"``), if any."""
        r = self.results[self.results["row"] == kind]
        return None if r.empty else r.iloc[0].to_dict()

    @property
    def corrected(self) -> bool:
        return bool(self.estimands.attrs.get("corrected", 1)) and "lift" in self.results.columns

    def named(self) -> dict[str, pd.DataFrame]:
        """The tables written to CSV and XLSX, by file/sheet name (machine keys, natural units)."""
        out = {"campaign_results": self.results, "placebo_check": self.placebos, "shrinkage": self.shrinkage,
               "convergence": self.diagnostics, "model_settings": self.settings, "provenance": self.provenance}
        if self.prep is not None:
            out["data_preparation"] = self.prep
        if self.predictive is not None:
            out["predictive_check"] = self.predictive
        if self.tests is not None:
            out["randomized_tests"] = self.tests
        if self.heldout_placebos is not None:
            out["placebo_heldout"] = self.heldout_placebos
        if self.tipping is not None:
            out["tipping_points"] = self.tipping
        return out


def _results(summary: pd.DataFrame, summary50: pd.DataFrame, fit: FitResult, nonviewable: dict,
             spend_given: bool, tipping: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per unit from the tidy summaries (at the level, and at 50% for the lift's inner band)."""
    est = fit.estimands
    users = {k: dict(zip(est.unit.values.astype(str), est[k].values, strict=True)) if k in est else {}
             for k in USER_COUNTS}
    camps = [str(u) for u, k in zip(est.unit.values, est["kind"].values, strict=True) if k == "campaign"]
    s = summary.set_index(["campaign", "quantity"])
    s50 = summary50.set_index(["campaign", "quantity"])
    present = set(summary["campaign"])
    units = camps + [u for u in (PORTFOLIO, NEW_CAMPAIGN) if u in present]
    rows = []
    for u in units:
        kind = "campaign" if u in camps else ("portfolio" if u == PORTFOLIO else "new campaign")
        r = {"campaign": u, "row": kind}
        r.update({k: users[k].get(u, np.nan) for k in USER_COUNTS})
        r["nonviewable_share"] = nonviewable.get(u, np.nan) if kind == "campaign" else np.nan

        def get(q, col, src=s, u=u):
            return float(src.loc[(u, q), col]) if (u, q) in src.index else np.nan

        r["lift_naive"] = get("lift_naive", "median")
        for q in ("lift_uncorrected", "lift", "incremental_conversions", "spend", "cost_per_incremental_conversion",
                  "incremental_revenue", "return_on_ad_spend"):
            r[q] = get(q, "median")
            if q != "spend":
                r[q + "_lower"], r[q + "_upper"] = get(q, "lower"), get(q, "upper")
            if q == "lift":
                r["lift_lower50"], r["lift_upper50"] = get(q, "lower", s50), get(q, "upper", s50)
        for p in PROBABILITIES:
            r[p] = get(p, "mean")
        if tipping is not None and u in tipping.index:
            tp_ = tipping.loc[u]
            for k in ("tip_interval", "tip_interval_spreads", "tip_positive", "tip_paid", "e_value_interval"):
                r[k] = float(tp_[k])
        notes = []
        if np.isinf(r.get("cost_per_incremental_conversion_upper", np.nan)):
            notes.append("cost per incremental conversion not bounded above: incremental conversions may be zero or "
                         "below")
        if r.get("spend") == 0:
            notes.append("spend is zero: no return on ad spend")
        if spend_given and kind == "campaign" and not np.isfinite(r.get("spend", np.nan)):
            notes.append("not in the spend file")
        r["notes"] = "; ".join(notes)
        rows.append(r)
    out = pd.DataFrame(rows)
    for k in USER_COUNTS:
        if k in out:
            out[k] = out[k].astype("Int64")  # whole numbers, empty for a new campaign
    keep = [k for k in COLUMNS if k in out.columns and (k in ("campaign", "row", "notes") or out[k].notna().any())]
    return out[keep]


def build_tables(fit: FitResult, spend: pd.DataFrame | None = None, prep_campaigns: pd.DataFrame | None = None,
                 currency: str = "USD", level: float | None = None, provenance: dict | None = None) -> ReportTables:
    """Compute the report's tables.

    Parameters
    ----------
    fit : FitResult
    spend : DataFrame, optional
        ``campaign, spend[, value_per_conversion]`` (checked).
    prep_campaigns : DataFrame, optional
        The prep summary's per-campaign table (for the non-viewable share).
    currency : str
        ISO code used in money headers.
    level : float, optional
        The interval level (default: the fit's).
    provenance : dict, optional
        Extra provenance rows (input hashes...).
    """
    level = level or fit.level
    if not re.fullmatch(r"[A-Za-z]{3}", str(currency)):
        raise InputError(problem=f"the currency {str(currency)[:40]!r} is not a three-letter ISO 4217 code",
                         file="--currency (or [report] currency in liftpool.toml)",
                         fix="give a code such as USD, EUR, GBP or SEK")
    est = fit.estimands
    if spend is not None:
        est = add_money(est, spend)
    summary = summarize(est, level)
    summary50 = summarize(est[[v for v in ("lift",) if v in est]], 0.5) if "lift" in est else summary.iloc[:0]
    nv = {} if prep_campaigns is None else prep_campaigns.set_index("campaign")["nonviewable_share"].to_dict()
    post = fit.idata.posterior
    residual_sd = float(np.median(post["residual_sd"].values)) if "residual_sd" in post else None
    tipping = None
    if fit.corrected and "users_seen" in est and "counterfactual_conversions" in est:
        tipping = tipping_points(est, level, residual_sd)
        if "incremental_revenue" not in est:
            tipping = tipping.drop(columns=["tip_paid", "tip_paid_spreads"])
    results = _results(summary, summary50, fit, nv, spend is not None,
                       None if tipping is None else tipping.set_index("campaign").reindex(
                           columns=["tip_interval", "tip_interval_spreads", "tip_positive", "tip_paid", "e_value_interval"]))
    spread = {}
    if "lift_sd" in post and fit.corrected:
        lo, hi = interval(post["lift_sd"].values, level)
        spread = {"median": float(np.median(post["lift_sd"].values)), "lower": lo, "upper": hi}
    placebos = placebo_summary(fit.idata, level)
    shrink = shrinkage_summary(fit.idata, level)
    diag = pd.DataFrame([{"check": c.name, "value": c.value, "threshold": c.threshold, "passed": c.passed,
                          "worst parameter": c.worst, "what to do": "" if c.passed else c.advice}
                         for c in fit.diagnostics.checks]) if fit.diagnostics.checks else pd.DataFrame(
        [{"check": "sampler", "value": np.nan, "threshold": np.nan, "passed": True,
          "worst parameter": "", "what to do": fit.diagnostics.note}])
    used = {**fit.settings.to_dict(), "target_accept": fit.settings.accept}
    settings = pd.DataFrame(sorted(used.items()), columns=["setting", "value"])
    settings["value"] = settings["value"].astype(str)
    prov = [("fit mode", fit.mode), ("seed", str(fit.settings.seed)),
            ("counts table SHA-256", fit.info.get("counts_sha256", "n/a")),
            ("fitted at (UTC)", fit.info.get("created", "n/a")), ("PyTensor backend", fit.info.get("backend", "n/a"))]
    prov += [(f"version of {k}", v) for k, v in fit.info.get("versions", {}).items()]
    prov += list((provenance or {}).items())
    prep = None
    if prep_campaigns is not None:
        keep = [c for c in ("campaign", "impressions", "measured_impressions", "viewable_impressions",
                            "nonviewable_share", "users_served", "users_unmeasured_only", "users_one_arm_cells",
                            "users_small_cells_dropped", "users_small_cells_merged", "users_seen", "users_unseen",
                            "cells", "target", "placebos") if c in prep_campaigns.columns]
        prep = prep_campaigns[keep].rename(columns=lambda x: x.replace("_", " "))
    pp = fit.info.get("posterior_predictive") or {}
    excess = {}
    for k in ("excess_mean", "excess_sd"):
        if k in post:
            lo, hi = interval(post[k].values, level)
            excess[k] = {"median": float(np.median(post[k].values)), "lower": lo, "upper": hi}
    tests_t, placebos_t, heldout_level = _heldout_tables(fit, summary, level)
    return ReportTables(results=results, summary=summary, estimands=est, placebos=placebos, shrinkage=shrink,
                        diagnostics=diag, prep=prep, settings=settings,
                        provenance=pd.DataFrame(prov, columns=["item", "value"]),
                        predictive=fit.predictive, currency=currency.upper(), level=level,
                        predictive_level=pp.get("level", fit.level), spend_given=spend is not None,
                        lift_spread=spread, tipping=tipping, tests=tests_t, heldout_placebos=placebos_t, excess=excess,
                        residual_sd=residual_sd, heldout_level=heldout_level)


def _heldout_tables(fit: FitResult, summary: pd.DataFrame, level: float
                    ) -> tuple[pd.DataFrame | None, pd.DataFrame | None, float | None]:
    """The tests beside the model without each (and with all), and the placebos' held-out predictions.

    The held-out intervals are at the report's level when the fit stored it (the usual levels and the
    fit's own), otherwise at the fit's level, labelled so; inside or not follows from the PIT value.
    """
    h = fit.heldout
    if h is None or h.empty:
        return None, None, None
    cl, cu, ml_, mu_ = level_columns(level)
    if cl not in h.columns:  # a level the fit did not store: its own, labelled
        level = float(fit.info.get("heldout", {}).get("level", fit.level))
        cl, cu, ml_, mu_ = "lower", "upper", "model_lower", "model_upper"
    L = f"{level * 100:g}"
    a = (1 - level) / 2
    h = h.assign(covered=(h["pit"] >= a) & (h["pit"] <= 1 - a), lower=h[cl], upper=h[cu], model_lower=h[ml_],
                 model_upper=h[mu_])
    tests = None
    ht = h[h["kind"] == "test"]
    if len(ht):
        lift = summary[summary["quantity"] == "lift"].set_index("campaign")
        z = float(stats.norm.ppf(0.5 + level / 2))
        tests = pd.DataFrame({
            "test": ht["item"].to_numpy(), "campaign": ht["campaign"].to_numpy(),
            "test lift among exposed": ht["observed"].to_numpy(),
            f"test, {L}% lower": (ht["observed"] - z * ht["std_error"]).to_numpy(),
            f"test, {L}% upper": (ht["observed"] + z * ht["std_error"]).to_numpy(),
            "model without the test, median": ht["model_median"].to_numpy(),
            f"without, {L}% lower": ht["model_lower"].to_numpy(), f"without, {L}% upper": ht["model_upper"].to_numpy(),
            "model with all tests, median": [float(lift.loc[c, "median"]) if c in lift.index else np.nan
                                             for c in ht["campaign"]],
            f"predicted test result, {L}% lower": ht["lower"].to_numpy(),
            f"predicted test result, {L}% upper": ht["upper"].to_numpy(),
            "inside": ht["covered"].astype(bool).to_numpy(),
            "check reliable": ~(ht["pareto_k"] > KHAT_LIMIT).to_numpy(),
        })
    hp = h[h["kind"] == "placebo"]
    placebos = None
    if len(hp):
        placebos = pd.DataFrame({
            "campaign": hp["campaign"].to_numpy(), "placebo outcome": hp["item"].to_numpy(),
            "estimate (log odds)": hp["observed"].to_numpy(),
            "predicted from the rest, median": hp["median"].to_numpy(),
            f"predicted, {L}% lower": hp["lower"].to_numpy(), f"predicted, {L}% upper": hp["upper"].to_numpy(),
            "inside": hp["covered"].astype(bool).to_numpy(),
            "check reliable": ~(hp["pareto_k"] > KHAT_LIMIT).to_numpy()})
    return tests, placebos, level
