"""Plain-language paragraphs for the finance reader."""

from __future__ import annotations

import numpy as np

from liftpool.reports.money import fmt_int, fmt_money, fmt_pct, fmt_prob, fmt_ratio
from liftpool.reports.tables import ReportTables

__all__ = ["campaign_paragraphs", "portfolio_paragraph"]


def campaign_paragraphs(t: ReportTables, flags: dict) -> list[tuple[str, str]]:
    """(campaign, sentence) for each campaign, in the table's order."""
    L = int(round(t.level * 100))
    cur = t.currency
    out = []
    no_placebo = set(flags.get("no_placebo", []))
    for r in t.campaigns.to_dict(orient="records"):
        c = r["campaign"]
        if "lift, median (%)" not in r:
            out.append((c, f"uncorrected lift {fmt_pct(r['uncorrected lift, median (%)'] / 100)} ({L}% interval "
                           f"{fmt_pct(r[f'uncorrected lift, {L}% lower (%)'] / 100)} to "
                           f"{fmt_pct(r[f'uncorrected lift, {L}% upper (%)'] / 100)}); not corrected for bias "
                           "because no placebo outcome was given."))
            continue
        s = (f"most likely added {fmt_int(r['incremental conversions, median'])} conversions ({L}% interval "
             f"{fmt_int(r[f'incremental conversions, {L}% lower'])} to {fmt_int(r[f'incremental conversions, {L}% upper'])})"
             f" among the {fmt_int(r['users seen'])} users who saw its ads: a lift of {fmt_pct(r['lift, median (%)'] / 100)}"
             f" ({fmt_pct(r[f'lift, {L}% lower (%)'] / 100)} to {fmt_pct(r[f'lift, {L}% upper (%)'] / 100)}) over what "
             "they would have done anyway.")
        key = f"cost per incremental conversion, median ({cur})"
        if key in r and np.isfinite(r.get(f"spend ({cur})", np.nan)):
            s += (f" Each extra conversion cost {fmt_money(r[key], cur)} ({fmt_money(r[f'cost per incremental conversion, {L}% lower ({cur})'], cur)}"
                  f" to {fmt_money(r[f'cost per incremental conversion, {L}% upper ({cur})'], cur)}).")
        if "P(return > 1)" in r and np.isfinite(r.get("P(return > 1)", np.nan)):
            s += (f" Return on ad spend {fmt_ratio(r['return on ad spend, median (x)'])}; the chance it paid for itself is "
                  f"{fmt_prob(r['P(return > 1)'])}.")
        if r["P(lift > 0)"] < 0.9:
            s += f" The data cannot rule out that it added nothing (chance of a positive lift {fmt_prob(r['P(lift > 0)'])})."
        if c in no_placebo:
            s += " It has no placebo outcome of its own, so its bias is borrowed from the other campaigns."
        out.append((c, s))
    return out


def portfolio_paragraph(t: ReportTables) -> str:
    p = t.portfolio
    L = int(round(t.level * 100))
    if "lift_median" not in p:
        return (f"{p['n_campaigns']} campaign(s). No bias-corrected portfolio estimate: either no placebo outcome was "
                "given or there is a single campaign.")
    lo, hi = p["inc_interval"]
    llo, lhi = p["lift_interval"]
    s = (f"Across the {p['n_campaigns']} campaigns, display advertising most likely added {fmt_int(p['inc_median'])} "
         f"conversions ({L}% interval {fmt_int(lo)} to {fmt_int(hi)}) among users who saw the ads, a lift of "
         f"{fmt_pct(p['lift_median'])} ({fmt_pct(llo)} to {fmt_pct(lhi)}).")
    if "spend" in p:
        s += f" Total spend {fmt_money(p['spend'], t.currency)}."
    if "roas_median" in p:
        a, b = p["roas_interval"]
        s += (f" Return on ad spend {fmt_ratio(p['roas_median'])} ({fmt_ratio(a)} to {fmt_ratio(b)}); the chance the "
              f"portfolio paid for itself is {fmt_prob(p['p_return'])}.")
    if "new_median" in p:
        a, b = p["new_interval"]
        s += (f" A new campaign like these would most likely lift conversions by about {fmt_pct(p['new_median'])} "
              f"({fmt_pct(a)} to {fmt_pct(b)}): the spread between campaigns is real.")
    return s
