"""Plain-language paragraphs for the finance reader, from the report's rows (natural units)."""

from __future__ import annotations

import math

import numpy as np

from liftpool.reports.money import fmt_count, fmt_money, fmt_pct, fmt_prob, fmt_ratio
from liftpool.reports.tables import ReportTables

__all__ = ["campaign_paragraphs", "portfolio_paragraph", "cost_sentence", "SPREAD_FLOOR", "SMALL_SAMPLE_CONVERSIONS",
           "could_be_zero", "small_sample", "tipping_sentence", "calibration_paragraph", "placebo_heldout_sentence"]

#: A spread of campaign lifts (sd, log odds) below this is "about the same" for the reader: 0.02
#: log odds is a 2% relative difference in the odds (common practice, no source).
SPREAD_FLOOR = 0.02


def _finite(x) -> bool:
    return x is not None and isinstance(x, (int, float)) and math.isfinite(x)


def cost_sentence(r: dict, cur: str, subject: str = "Each extra conversion") -> str:
    """The cost per incremental conversion in words, right in every case.

    Cases: no spend row; zero spend; incremental conversions most likely zero or below (no cost can be
    given); the interval reaching zero or below (no upper bound); bounded.
    """
    spend = r.get("spend")
    if not _finite(spend):
        return ""
    if spend == 0:
        return " Its spend is zero, so it has no cost per extra conversion and no return on spend."
    med, lo, hi = (r.get("cost_per_incremental_conversion"), r.get("cost_per_incremental_conversion_lower"),
                   r.get("cost_per_incremental_conversion_upper"))
    if not _finite(med):
        best = f" (at the favourable end of the interval it cost {fmt_money(lo, cur)} each)" if _finite(lo) else ""
        return (f" It most likely added no conversions, so no cost per extra conversion can be given{best}; its "
                f"spend was {fmt_money(spend, cur)}.")
    if not _finite(hi):
        return (f" {subject} most likely cost {fmt_money(med, cur)}, at best {fmt_money(lo, cur)}; the interval "
                "includes no added conversions at all, so the cost has no upper bound.")
    return f" {subject} cost {fmt_money(med, cur)} ({fmt_money(lo, cur)} to {fmt_money(hi, cur)})."


def _return_sentence(r: dict, whole: str) -> str:
    if not _finite(r.get("return_on_ad_spend")) or not _finite(r.get("p_paid_for_itself")):
        return ""
    return (f" Return on ad spend {fmt_ratio(r['return_on_ad_spend'])} ({fmt_ratio(r['return_on_ad_spend_lower'])} "
            f"to {fmt_ratio(r['return_on_ad_spend_upper'])}); the chance {whole} paid for itself is "
            f"{fmt_prob(r['p_paid_for_itself'])}.")


#: Fewer target conversions than this (seen and unseen users together) make a campaign's own estimate
#: thin; the report says so (common practice, no source: a rate from a couple of dozen events is
#: still very noisy).
SMALL_SAMPLE_CONVERSIONS = 30


def could_be_zero(r: dict) -> bool:
    """The one rule for "cannot rule out that it added nothing": the interval's lower end at or below 0."""
    return bool(r["lift_lower"] <= 0)


def small_sample(r: dict) -> bool:
    """The one rule for the small-sample caution: fewer than :data:`SMALL_SAMPLE_CONVERSIONS` target conversions."""
    n = r.get("target_conversions_seen", np.nan) + r.get("target_conversions_unseen", np.nan)
    return bool(n == n and n < SMALL_SAMPLE_CONVERSIONS)


def campaign_paragraphs(t: ReportTables, flags: dict) -> list[tuple[str, str]]:
    """(campaign, sentence) for each campaign, in the table's order."""
    L = int(round(t.level * 100))
    cur = t.currency
    out = []
    no_placebo = set(flags.get("no_placebo", []))
    for r in t.campaigns.to_dict(orient="records"):
        c = r["campaign"]
        if not t.corrected:
            out.append((c, f"uncorrected lift {fmt_pct(r['lift_uncorrected'])} ({L}% interval "
                           f"{fmt_pct(r['lift_uncorrected_lower'])} to {fmt_pct(r['lift_uncorrected_upper'])}); "
                           "not corrected for bias because no placebo outcome was given."))
            continue
        s = (f"most likely added {fmt_count(r['incremental_conversions'])} ({L}% interval "
             f"{fmt_count(r['incremental_conversions_lower'], unit=False)} to "
             f"{fmt_count(r['incremental_conversions_upper'], unit=False)}) among the "
             f"{fmt_count(r['users_seen'], 'user', 'users')} who saw its ads: a lift of {fmt_pct(r['lift'])} "
             f"({fmt_pct(r['lift_lower'])} to {fmt_pct(r['lift_upper'])}) over what they would have done anyway.")
        s += cost_sentence(r, cur)
        s += _return_sentence(r, "it")
        if could_be_zero(r):
            s += (f" The data cannot rule out that it added nothing: the {L}% interval reaches zero (chance of a "
                  f"positive lift {fmt_prob(r['p_lift_positive'])}).")
        if small_sample(r):
            n = int(r["target_conversions_seen"] + r["target_conversions_unseen"])
            s += (f" Its own data are thin ({fmt_count(n, 'target conversion', 'target conversions')} in all), so its "
                  "estimate leans on the other campaigns (partial pooling).")
        if c in no_placebo:
            s += " It has no placebo outcome of its own, so its bias is borrowed from the other campaigns."
        s += tipping_sentence(r, t)
        if t.spend_given and not _finite(r.get("spend")):
            s += " It is not in the spend file, so its cost is not shown and the totals leave it out."
        out.append((c, s))
    return out


def portfolio_paragraph(t: ReportTables) -> str:
    """The portfolio's totals and the new-campaign outlook in words."""
    L = int(round(t.level * 100))
    p = t.pooled("portfolio")
    n = len(t.campaigns)
    if p is None or not _finite(p.get("lift")):
        s = (f"{n} campaign(s). No bias-corrected portfolio estimate: no placebo outcome was given, so only the "
             "uncorrected lift is shown.")
        if t.spend_given:
            s += (" A spend file was given, but costs and returns need the bias-corrected estimate, so they are not "
                  "shown.")
        return s
    s = (f"Across the {n} campaigns, display advertising most likely added {fmt_count(p['incremental_conversions'])} "
         f"({L}% interval {fmt_count(p['incremental_conversions_lower'], unit=False)} to "
         f"{fmt_count(p['incremental_conversions_upper'], unit=False)}) among users who saw the ads, a lift of "
         f"{fmt_pct(p['lift'])} ({fmt_pct(p['lift_lower'])} to {fmt_pct(p['lift_upper'])}).")
    if _finite(p.get("spend")):
        missing = t.estimands.attrs.get("campaigns_without_spend", "")
        s += f" Total spend {fmt_money(p['spend'], t.currency)}"
        s += (f" (leaving out {missing}, which the spend file does not list)." if missing else ".")
        s += cost_sentence(p, t.currency, subject="Across the portfolio each extra conversion")
        s += _return_sentence(p, "the portfolio")
    elif t.spend_given:
        s += " A spend file was given, but none of its campaigns has a bias-corrected estimate to cost."
    s += tipping_sentence(p, t, whose="every target's")
    new = t.pooled("new campaign")
    if new is not None and _finite(new.get("lift")):
        s += (f" A new campaign like these would most likely lift conversions by about {fmt_pct(new['lift'])} "
              f"({fmt_pct(new['lift_lower'])} to {fmt_pct(new['lift_upper'])}, the range a campaign not yet seen "
              "could fall in).")
        sp = t.lift_spread
        if sp:
            if sp["lower"] > SPREAD_FLOOR:
                s += (f" The campaigns' true lifts differ: their spread is {sp['lower']:.2f} to {sp['upper']:.2f} "
                      "on the log-odds scale.")
            else:
                s += (" The data cannot tell whether the campaigns' true lifts differ: their spread could be close "
                      f"to zero ({sp['lower']:.2f} to {sp['upper']:.2f} on the log-odds scale).")
    return s


def _logodds(x: float) -> str:
    """A small log-odds amount with enough digits to be non-zero on the page."""
    return f"{x:.2f}" if abs(x) >= 0.095 else f"{x:.3f}"


def _bias_amount(x: float, spread: float | None) -> str:
    """A tipping point in words: log odds, and in outcome-to-outcome spreads when known."""
    txt = f"{_logodds(x)} on the log-odds scale (odds {math.exp(x):.2f} times as high)"
    if spread and spread > 0:
        txt += f", {x / spread:.1f} times the spread of the bias between outcomes"
    return txt


def tipping_sentence(r: dict, t: ReportTables, whose: str = "its target's") -> str:
    """One plain sentence: how much extra target-only bias the campaign's (or portfolio's) conclusion survives."""
    tip = r.get("tip_interval", np.nan)
    if not _finite(tip):
        return ""
    sp = t.residual_sd
    than = "what the placebos and the randomized tests show" if t.excess else "the placebos'"
    if tip > 0:
        s = (f" The conclusion that it added conversions holds unless {whose} own bias exceeds {than} "
             f"by more than {_bias_amount(tip, sp)}.")
    else:
        pos = r.get("tip_positive", np.nan)
        s = (f" A positive lift is more likely than not unless {whose} own bias exceeds {than} by more "
             f"than {_bias_amount(pos, sp)}." if _finite(pos) and pos > 0 else "")
    paid = r.get("tip_paid", np.nan)
    if _finite(paid) and paid > 0:
        s += f" It more likely than not paid for itself unless that excess is above {_logodds(paid)}."
    return s


def calibration_paragraph(t: ReportTables) -> str:
    """What the randomized tests say about the correction, or that there were none."""
    L = int(round(t.level * 100))
    if t.tests is None or t.tests.empty:
        if not t.corrected:
            return ""
        return ("No randomized test was given, so the correction rests on the placebos alone: it assumes the "
                "target's bias is its placebos' (up to how much the bias differs between outcomes). The last "
                "sentence of each campaign above says how large a target-only bias would overturn its conclusion.")
    n = len(t.tests)
    inside = int(t.tests["inside"].sum())
    H = f"{(t.heldout_level or t.level) * 100:g}"
    s = (f"{n} randomized test{'s' if n != 1 else ''} ({', '.join(t.tests['test'].astype(str))}) calibrate the "
         "correction. Each test pins its campaign's lift, so the seen-versus-unseen gap there measures the "
         "target's own bias directly.")
    e = t.excess.get("excess_mean")
    if e:
        s += (f" The tests put the target's bias beyond its placebos' at {e['median']:+.2f} on the log-odds scale "
              f"({L}% interval {e['lower']:+.2f} to {e['upper']:+.2f}); every campaign's estimate is corrected by it "
              "and its interval widened by how much it may differ between campaigns.")
        if e["lower"] > 0:
            s += " The placebos alone understate the bias: without the tests these lifts would be too high."
        elif e["upper"] < 0:
            s += " The placebos alone overstate the bias: without the tests these lifts would be too low."
    s += (f" Leaving each tested campaign's test out, the model predicted its result within the {H}% predictive "
          f"interval for {inside} of {n}.")
    if n < 5:
        s += " With so few tests the excess bias is still uncertain; each further test narrows it."
    return s


def placebo_heldout_sentence(t: ReportTables) -> str:
    """The leave-one-placebo-out coverage in words."""
    h = t.heldout_placebos
    if h is None or h.empty:
        return ""
    L = f"{(t.heldout_level or t.level) * 100:g}"
    n, inside = len(h), int(h["inside"].sum())
    s = (f"Each placebo predicted from all the other data (its own left out): {inside} of {n} fall inside their "
         f"{L}% predictive interval (about {L}% expected).")
    if n >= 10 and inside / n < t.level - 0.15:
        s += (" Far fewer than expected: the placebos' biases differ more than the model allows, so the target's "
              "may too; treat the intervals as too narrow.")
    unreliable = int((~h["check reliable"]).sum())
    if unreliable:
        s += f" For {unreliable} the check is approximate (a placebo that dominates its campaign's bias)."
    return s
