"""Report tables computed from a fit's posterior draws (and the optional spend and prep summary).

Every number here is a posterior quantity: a median, an equal-tailed interval or a
probability over the draws stored in the fit.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from liftpool.models.fit import FitResult

__all__ = ["ReportTables", "build_tables", "interval"]


def interval(draws: np.ndarray, level: float) -> tuple[float, float]:
    """Equal-tailed interval of draws at ``level``."""
    a = (1 - level) / 2
    lo, hi = np.quantile(np.asarray(draws, dtype=float).ravel(), [a, 1 - a])
    return float(lo), float(hi)


def _draws(fit: FitResult, name: str, campaign: str) -> np.ndarray | None:
    post = fit.idata.posterior
    if name not in post:
        return None
    return post[name].sel(campaign=campaign).values.ravel()


@dataclass
class ReportTables:
    """All tables of a report (DataFrames with units in their column names)."""

    campaigns: pd.DataFrame
    portfolio: dict
    placebos: pd.DataFrame
    shrinkage: pd.DataFrame
    diagnostics: pd.DataFrame
    prep: pd.DataFrame | None
    settings: pd.DataFrame
    provenance: pd.DataFrame
    predictive: pd.DataFrame | None = None
    draws: dict = field(default_factory=dict, repr=False)
    currency: str = "USD"
    level: float = 0.9

    def named(self) -> dict[str, pd.DataFrame]:
        """The tables that are written to CSV and XLSX, by file/sheet name."""
        out = {"campaign_results": self.campaigns, "placebo_check": self.placebos, "shrinkage": self.shrinkage,
               "convergence": self.diagnostics, "model_settings": self.settings, "provenance": self.provenance}
        if self.prep is not None:
            out["data_preparation"] = self.prep
        if self.predictive is not None:
            out["predictive_check"] = self.predictive
        return out


def build_tables(fit: FitResult, spend: pd.DataFrame | None = None, prep_campaigns: pd.DataFrame | None = None,
                 currency: str = "USD", level: float | None = None, provenance: dict | None = None) -> ReportTables:
    """Compute the report's tables.

    Parameters
    ----------
    fit : FitResult
    spend : DataFrame, optional
        ``campaign, spend[, value_per_conversion]``.
    prep_campaigns : DataFrame, optional
        The prep summary's per-campaign table (for the non-viewable share).
    currency : str
        ISO code used in money headers.
    level : float, optional
        The main interval level (default: the fit's).
    provenance : dict, optional
        Extra provenance rows (input hashes...).
    """
    level = level or fit.settings.level
    cd = fit.idata.constant_data
    camps = [str(c) for c in fit.idata.posterior.campaign.values]
    corrected = fit.corrected
    main_q = "lift" if corrected else "lift_uncorrected"
    spend_map = {} if spend is None else spend.set_index("campaign")["spend"].astype(float).to_dict()
    value_map = ({} if spend is None or "value_per_conversion" not in spend.columns
                 else spend.set_index("campaign")["value_per_conversion"].astype(float).dropna().to_dict())
    nv = {} if prep_campaigns is None else prep_campaigns.set_index("campaign")["nonviewable_share"].to_dict()
    L = int(round(level * 100))
    cur = currency.upper()
    rows, draws = [], {}
    for c in camps:
        row = {"campaign": c,
               "users seen": int(cd["users_seen"].sel(campaign=c)),
               "users unseen": int(cd["users_unseen"].sel(campaign=c)),
               "non-viewable share of measured impressions (%)": 100 * nv[c] if c in nv else np.nan}
        naive = _draws(fit, "lift_naive", c)
        row["naive lift, median (%)"] = (100 * np.median(naive)
                                         if naive is not None and np.isfinite(naive).all() else np.nan)
        unc = _draws(fit, "lift_uncorrected", c)
        lo, hi = interval(unc, level)
        row.update({"uncorrected lift, median (%)": 100 * np.median(unc),
                    f"uncorrected lift, {L}% lower (%)": 100 * lo, f"uncorrected lift, {L}% upper (%)": 100 * hi})
        d = {"lift_uncorrected": unc}
        if corrected:
            lift = _draws(fit, "lift", c)
            inc = _draws(fit, "incremental_conversions", c)
            lo50, hi50 = interval(lift, 0.5)
            lo, hi = interval(lift, level)
            ilo, ihi = interval(inc, level)
            row.update({"lift, median (%)": 100 * np.median(lift), "lift, 50% lower (%)": 100 * lo50,
                        "lift, 50% upper (%)": 100 * hi50, f"lift, {L}% lower (%)": 100 * lo,
                        f"lift, {L}% upper (%)": 100 * hi,
                        "incremental conversions, median": float(np.median(inc)),
                        f"incremental conversions, {L}% lower": ilo, f"incremental conversions, {L}% upper": ihi,
                        "P(lift > 0)": float(np.mean(lift > 0))})
            d.update({"lift": lift, "incremental_conversions": inc})
            if c in spend_map:
                s = spend_map[c]
                row[f"spend ({cur})"] = s
                med = float(np.median(inc))
                row[f"cost per incremental conversion, median ({cur})"] = s / med if med > 0 else np.inf
                row[f"cost per incremental conversion, {L}% lower ({cur})"] = s / ihi if ihi > 0 else np.inf
                row[f"cost per incremental conversion, {L}% upper ({cur})"] = s / ilo if ilo > 0 else np.inf
                if c in value_map:
                    rev = inc * value_map[c]
                    roas = rev / s if s > 0 else np.full_like(rev, np.nan)
                    rlo, rhi = interval(rev, level)
                    qlo, qhi = interval(roas, level)
                    row.update({f"incremental revenue, median ({cur})": float(np.median(rev)),
                                f"incremental revenue, {L}% lower ({cur})": rlo,
                                f"incremental revenue, {L}% upper ({cur})": rhi,
                                "return on ad spend, median (x)": float(np.median(roas)),
                                f"return on ad spend, {L}% lower (x)": qlo, f"return on ad spend, {L}% upper (x)": qhi,
                                "P(return > 1)": float(np.mean(rev > s))})
                    d["roas"] = roas
        rows.append(row)
        draws[c] = d
    campaigns = pd.DataFrame(rows)

    portfolio = {"n_campaigns": len(camps), "main_quantity": main_q}
    s_tab = fit.summary.set_index(["campaign", "quantity"])
    if corrected and ("(portfolio)", "lift") in s_tab.index:
        post = fit.idata.posterior
        inc_tot = post["incremental_conversions"].values.sum(axis=-1).ravel()
        cf_tot = post["counterfactual_conversions"].values.sum(axis=-1).ravel()
        pl = inc_tot / cf_tot
        portfolio.update({"lift_median": float(np.median(pl)), "lift_interval": interval(pl, level),
                          "inc_median": float(np.median(inc_tot)), "inc_interval": interval(inc_tot, level)})
        draws["(portfolio)"] = {"lift": pl, "incremental_conversions": inc_tot}
        spent = [c for c in camps if c in spend_map]
        if spent:
            total = float(sum(spend_map[c] for c in spent))
            portfolio["spend"] = total
            idx = [camps.index(c) for c in spent]
            inc_sp = post["incremental_conversions"].values[..., idx]
            if all(c in value_map for c in spent):
                rev = (inc_sp * np.array([value_map[c] for c in spent])).sum(axis=-1).ravel()
                portfolio.update({"roas_median": float(np.median(rev / total)),
                                  "roas_interval": interval(rev / total, level),
                                  "p_return": float(np.mean(rev > total))})
                draws["(portfolio)"]["roas"] = rev / total
        if ("(new campaign)", "lift") in s_tab.index:
            r = s_tab.loc[("(new campaign)", "lift")]
            portfolio["new_median"] = float(r["median"])
            portfolio["new_interval"] = (float(r["lower"]), float(r["upper"]))

    placebos = _placebo_table(fit, level)
    shrink = _shrinkage_table(fit, level)
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
    return ReportTables(campaigns=campaigns, portfolio=portfolio, placebos=placebos, shrinkage=shrink,
                        diagnostics=diag, prep=prep, settings=settings,
                        provenance=pd.DataFrame(prov, columns=["item", "value"]), draws=draws,
                        predictive=fit.predictive,
                        currency=cur, level=level)


def _placebo_table(fit: FitResult, level: float) -> pd.DataFrame:
    """Each placebo's seen-vs-unseen effect (log odds) before and after the bias correction."""
    cd = fit.idata.constant_data
    post = fit.idata.posterior
    roles = cd["pair_role"].values.astype(str)
    rows = []
    L = int(round(level * 100))
    for i in np.flatnonzero(roles == "placebo"):
        pair = str(cd["pair"].values[i])
        camp, outcome = str(cd["pair_campaign"].values[i]), str(cd["pair_outcome"].values[i])
        if "effect" in post:
            before = post["effect"].isel(pair=i).values.ravel()
            after = before - post["bias"].sel(campaign=camp).values.ravel()
        else:  # quick mode: the estimate with its standard error, then minus the portfolio bias
            rng = np.random.default_rng(i)
            est, se = float(cd["pair_estimate"].values[i]), float(cd["pair_std_error"].values[i])
            before = rng.normal(est, se, 4000)
            bm = post["bias_mean"].values.ravel() if "bias_mean" in post else np.zeros(1)
            after = before - rng.choice(bm, 4000)
        blo, bhi = interval(before, level)
        alo, ahi = interval(after, level)
        rows.append({"campaign": camp, "placebo outcome": outcome, "pair": pair,
                     "before correction, median (log odds)": float(np.median(before)),
                     f"before, {L}% lower": blo, f"before, {L}% upper": bhi,
                     "after correction, median (log odds)": float(np.median(after)),
                     f"after, {L}% lower": alo, f"after, {L}% upper": ahi,
                     "before excludes zero": bool(blo > 0 or bhi < 0), "after excludes zero": bool(alo > 0 or ahi < 0)})
    return pd.DataFrame(rows)


def _shrinkage_table(fit: FitResult, level: float) -> pd.DataFrame:
    """Each campaign alone (its target estimate minus its own placebos' mean) versus pooled."""
    cd = fit.idata.constant_data
    post = fit.idata.posterior
    est = pd.DataFrame({"campaign": cd["pair_campaign"].values.astype(str), "role": cd["pair_role"].values.astype(str),
                        "estimate": cd["pair_estimate"].values, "se": cd["pair_std_error"].values})
    pooled_bias = float(post["bias_mean"].mean()) if "bias_mean" in post else 0.0
    rows = []
    for c in [str(x) for x in post.campaign.values]:
        e = est[est.campaign == c]
        t = e[e.role == "target"].iloc[0]
        pl = e[e.role == "placebo"]
        b, bse = (float(pl.estimate.mean()), float(np.sqrt((pl.se**2).sum()) / len(pl))) if len(pl) else (pooled_bias, 0.0)
        pooled = post["lift_logodds"].sel(campaign=c).values.ravel()
        lo, hi = interval(pooled, level)
        rows.append({"campaign": c, "alone (log odds)": float(t.estimate - b),
                     "alone standard error": float(np.hypot(t.se, bse)),
                     "pooled, median (log odds)": float(np.median(pooled)), "pooled lower": lo, "pooled upper": hi,
                     "target conversions": int(cd["target_conversions_seen"].sel(campaign=c)
                                               + cd["target_conversions_unseen"].sel(campaign=c)),
                     "own placebos": int(len(pl))})
    return pd.DataFrame(rows)
