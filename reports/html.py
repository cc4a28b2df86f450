"""The self-contained HTML report: inline CSS, images embedded, no scripts, no external fetches.

Every user-provided string (campaign, outcome, cell and file names) goes through ``esc``.
"""

from __future__ import annotations

import base64
import re
from html import escape

import numpy as np
import pandas as pd

from liftpool.reports.glossary import GLOSSARY
from liftpool.reports.money import fmt_int, fmt_money, fmt_pct, fmt_plain, fmt_prob, fmt_ratio
from liftpool.reports.tables import KIND_OF_ROW, ReportTables
from liftpool.reports.text import calibration_paragraph, placebo_heldout_sentence

__all__ = ["render_html", "CAUTIONS"]

CSS = """
@page { size: auto; margin: 14mm 12mm; }
* { box-sizing: border-box; }
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: #111; background: #fff;
       max-width: 186mm; margin: 0 auto; padding: 8mm 0; font-size: 10pt; line-height: 1.4; }
h1 { font-size: 17pt; margin: 0 0 2mm; } h2 { font-size: 13pt; margin: 7mm 0 2mm; border-bottom: 1.5px solid #111;
     page-break-after: avoid; } h3 { font-size: 11pt; margin: 4mm 0 1mm; page-break-after: avoid; }
.sub { color: #444; margin: 0 0 4mm; }
.status { border: 1.5px solid #111; padding: 2.5mm 3.5mm; margin: 3mm 0; }
.status.bad { border: 3px double #111; background: #e6e6e6; font-weight: bold; }
.status.warn { border-style: dashed; }
.glossary dt { font-weight: bold; margin-top: 2mm; } .glossary dd { margin: 0 0 1mm 5mm; }
.caution { border-left: 4px solid #111; padding: 1mm 3mm; margin: 3mm 0; background: #f2f2f2; }
table { border-collapse: collapse; width: 100%; font-size: 7.6pt; margin: 2mm 0 3mm; }
th, td { padding: 1mm 1mm; border-bottom: 0.6px solid #999; text-align: right; vertical-align: top; }
th { border-bottom: 1.5px solid #111; font-weight: bold; background: #f2f2f2; }
td.l, th.l { text-align: left; } td.l { overflow-wrap: break-word; }
td:not(.l):not(.iv), .nw { white-space: nowrap; }
th { font-size: 7.2pt; } tr { page-break-inside: avoid; } thead { display: table-header-group; }
.fig { margin: 3mm 0 5mm; page-break-inside: avoid; } .fig img { max-width: 100%; height: auto; }
.fig .cap { font-size: 8.5pt; color: #333; }
p.camp { margin: 1.5mm 0; } .muted { color: #555; font-size: 8.5pt; }
code { font-family: "DejaVu Sans Mono", monospace; font-size: 8pt; word-break: break-all; }
"""

CAUTIONS = [
    "<b>This is an observational estimate, not a randomized test.</b> No one was held out at random; the "
    "estimate compares users who saw an ad with users who were served the same campaign but never saw it.",
    "It relies on the <b>placebo outcomes sharing the target's biases</b>: conversions the ads cannot cause, "
    "affected by the same browsing habits and targeting. The model learns how much the bias varies from outcome to "
    "outcome and widens every interval by it, but a bias the placebos do not share is not corrected.",
    "Within each cell (impression frequency, viewability history, chosen covariates) whether a served ad was viewable "
    "is treated as close to random. <b>Residual bias may remain</b>, for example from intent for the specific product, "
    "cross-device users or cookie churn; unmeasured viewable impressions push some treated users into the unseen "
    "group and understate the lift.",
    "The lift applies to users who saw the ads, within the attribution window; it is not a forecast for more "
    "impressions to new audiences.",
    "<b>Use randomized tests where they are affordable</b>, and treat these intervals as the best available "
    "evidence, not as proof.",
]


def esc(x) -> str:
    return escape(str(x), quote=True)


def esc_name(x) -> str:
    """A user's name, escaped, that may break only after ``_ - . /`` (never mid-word on a page)."""
    return re.sub(r"([_\-./])", r"\1<wbr>", esc(x))


def _num(text: str) -> str:
    """A number's cell: right-aligned and never broken across lines."""
    return f'<td class="n">{esc(text)}</td>'


def _img(name: str, png: bytes, caption: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return (f'<div class="fig"><img alt="{esc(caption)}" src="data:image/png;base64,{b64}">'
            f'<div class="cap">{esc(caption)}</div></div>')


def _iv(lo, hi, f) -> str:
    # an interval may wrap between its ends ("a to" / "b"), a number never; none at all is one "n/a"
    if not (np.isfinite(lo) or np.isfinite(hi)):
        return "n/a"
    return f'<span class="nw">{esc(f(lo))}\u00a0to</span> <span class="nw">{esc(f(hi))}</span>'


def _name(r: dict) -> str:
    """A row's first cell: the campaign, or what a pooled row is (escaped)."""
    if r["row"] == "campaign":
        return esc_name(r["campaign"])
    return f"<i>{esc(KIND_OF_ROW[r['row']])}</i>"


def _lift_table(t: ReportTables) -> str:
    L = int(round(t.level * 100))
    rows_in = t.results.to_dict(orient="records")
    naive = "lift_naive" in t.results.columns
    head = ["campaign", "users seen", "users unseen", "non-viewable share"] + (["naive lift"] if naive else [])
    head += ["uncorrected lift"]
    if t.corrected:
        head += ["bias-corrected lift (median)", "50% interval", f"{L}% interval", "incremental conversions",
                 f"{L}% interval", "P(lift > 0)"]
    else:
        head += [f"{L}% interval"]

    def v(r, k):
        return r.get(k, np.nan)

    rows = []
    for r in rows_in:
        share = v(r, "nonviewable_share")
        cells = [f'<td class="l">{_name(r)}</td>', f'<td class="n">{fmt_int(v(r, "users_seen"))}</td>',
                 f'<td class="n">{fmt_int(v(r, "users_unseen"))}</td>',
                 f'<td class="n">{fmt_pct(share, signed=False) if np.isfinite(share) else "n/a"}</td>']
        if naive:
            cells.append(f"<td>{fmt_pct(v(r, 'lift_naive'))}</td>")
        cells.append(f"<td>{fmt_pct(v(r, 'lift_uncorrected'))}</td>")
        if t.corrected:
            cells += [f"<td><b>{fmt_pct(v(r, 'lift'))}</b></td>",
                      f"<td class='iv'>{_iv(v(r, 'lift_lower50'), v(r, 'lift_upper50'), fmt_pct)}</td>",
                      f"<td class='iv'>{_iv(v(r, 'lift_lower'), v(r, 'lift_upper'), fmt_pct)}</td>",
                      f"<td>{fmt_int(v(r, 'incremental_conversions'))}</td>",
                      f"<td class='iv'>{_iv(v(r, 'incremental_conversions_lower'), v(r, 'incremental_conversions_upper'), fmt_int)}"
                      "</td>",
                      f"<td>{fmt_prob(v(r, 'p_lift_positive'))}</td>"]
        else:
            cells.append(f"<td class='iv'>{_iv(v(r, 'lift_uncorrected_lower'), v(r, 'lift_uncorrected_upper'), fmt_pct)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    th = "".join(f'<th class="l">{esc(h)}</th>' if i == 0 else f"<th>{esc(h)}</th>" for i, h in enumerate(head))
    return f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _money_table(t: ReportTables) -> str:
    L = int(round(t.level * 100))
    cur = t.currency
    if not t.spend_given:
        return '<p class="muted">No spend file was given: costs and returns are not shown.</p>'
    if "spend" not in t.results.columns:
        return ('<p class="muted">A spend file was given, but costs and returns need the bias-corrected estimate, '
                "which needs placebo outcomes; none was given.</p>")
    has_value = "return_on_ad_spend" in t.results.columns
    head = ["campaign", f"spend ({cur})", f"cost per incremental conversion ({cur})", f"{L}% interval"]
    if has_value:
        head += [f"incremental revenue ({cur})", f"{L}% interval", "return on ad spend", f"{L}% interval",
                 "P(paid for itself)"]
    rows = []
    missing = []
    for r in t.results.to_dict(orient="records"):
        if not np.isfinite(r.get("spend", np.nan)):
            if r["row"] == "campaign":
                missing.append(r["campaign"])
            continue
        m = lambda x: fmt_money(x, cur)  # noqa: E731
        cells = [f'<td class="l">{_name(r)}</td>', f"<td>{m(r['spend'])}</td>",
                 f"<td><b>{m(r['cost_per_incremental_conversion'])}</b></td>",
                 f"<td class='iv'>{_iv(r['cost_per_incremental_conversion_lower'], r['cost_per_incremental_conversion_upper'], m)}"
                 "</td>"]
        if has_value and np.isfinite(r.get("return_on_ad_spend", np.nan)):
            cells += [f"<td>{m(r['incremental_revenue'])}</td>",
                      f"<td class='iv'>{_iv(r['incremental_revenue_lower'], r['incremental_revenue_upper'], m)}</td>",
                      f"<td><b>{fmt_ratio(r['return_on_ad_spend'])}</b></td>",
                      f"<td class='iv'>{_iv(r['return_on_ad_spend_lower'], r['return_on_ad_spend_upper'], fmt_ratio)}</td>",
                      f"<td>{fmt_prob(r['p_paid_for_itself'])}</td>"]
        elif has_value:
            cells += ["<td>n/a</td>"] * 5
        rows.append("<tr>" + "".join(cells) + "</tr>")
    th = "".join(f'<th class="l">{esc(h)}</th>' if i == 0 else f"<th>{esc(h)}</th>" for i, h in enumerate(head))
    note = ""
    if missing:
        note = (f'<p class="caution">Not in the spend file, so left out of this table and of the totals: '
                f"{esc(', '.join(missing))}.</p>")
    return f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(rows)}</tbody></table>{note}"


def _fmt_lo(x) -> str:
    if not np.isfinite(x):
        return "beyond ±5" if np.isinf(x) else "n/a"
    return f"{x:+.2f}"


def _tipping_table(t: ReportTables) -> str:
    """How much extra target-only bias each conclusion survives (log odds; spreads; E-value)."""
    if t.tipping is None or "tip_interval" not in t.results.columns:
        return ""
    L = int(round(t.level * 100))
    paid = "tip_paid" in t.results.columns
    head = ["campaign", f"{L}% lower end reaches 0 at", "in spreads between outcomes", "P(lift > 0) below 50% at"]
    head += ["P(paid for itself) below 50% at"] if paid else []
    head += [f"E-value of the {L}% lower end"]
    rows = []
    for r in t.results.to_dict(orient="records"):
        if r["row"] not in ("campaign", "portfolio") or not np.isfinite(r.get("tip_positive", np.nan)) and not np.isinf(
                r.get("tip_positive", np.nan)):
            continue
        sp = r.get("tip_interval_spreads", np.nan)
        cells = [f'<td class="l">{_name(r)}</td>', f"<td><b>{esc(_fmt_lo(r['tip_interval']))}</b></td>",
                 f"<td>{esc(f'{sp:+.1f}') if np.isfinite(sp) else 'n/a'}</td>",
                 f"<td>{esc(_fmt_lo(r['tip_positive']))}</td>"]
        if paid:
            cells.append(f"<td>{esc(_fmt_lo(r.get('tip_paid', np.nan)))}</td>")
        ev = r.get("e_value_interval", np.nan)
        cells.append(f"<td>{esc(f'{ev:.2f}') if np.isfinite(ev) else 'n/a'}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    th = "".join(f'<th class="l">{esc(h)}</th>' if i == 0 else f"<th>{esc(h)}</th>" for i, h in enumerate(head))
    return (f"<p>The correction assumes each target's bias equals its placebos' (up to the learned spread between "
            f"outcomes{', and the excess the randomized tests show' if t.excess else ''}). Each column is the extra "
            "bias on the target alone, on the log-odds scale, at which a conclusion flips (tipping-point analysis); "
            "a negative value means it does not hold even without extra bias. The E-value is the related measure "
            "on the risk-ratio scale (VanderWeele &amp; Ding 2017): how strongly a hidden confounder would have to be "
            "tied to both seeing the ads and converting to explain the lower end away.</p>"
            f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def _df_table(df: pd.DataFrame, fmt: dict | None = None) -> str:
    fmt = fmt or {}
    th = "".join(f'<th class="l">{esc(c)}</th>' for c in df.columns)
    body = []
    for r in df.itertuples(index=False):
        tds = []
        for col, v in zip(df.columns, r, strict=True):
            if col in fmt:
                tds.append(f'<td class="l">{esc(fmt[col](v))}</td>')
            elif isinstance(v, (bool, np.bool_)):
                tds.append(f'<td class="l">{"yes" if v else "no"}</td>')
            elif isinstance(v, (float, np.floating)):
                tds.append(_num(fmt_plain(v)))
            elif isinstance(v, (int, np.integer)):
                tds.append(_num(f"{v:,}"))
            else:
                tds.append(f'<td class="l">{esc_name(v)}</td>')
        body.append("<tr>" + "".join(tds) + "</tr>")
    return f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def render_html(t: ReportTables, figures: dict[str, bytes], paragraphs: list[tuple[str, str]], portfolio: str,
                converged: bool, mode: str, flags: dict, title: str, prep_totals: dict | None,
                screen: tuple | None = None, prep_warnings: tuple[str, ...] = ()) -> str:
    """The self-contained report page; ``screen`` is (suggested covariates, ranking, balance) of a screen."""
    L = int(round(t.level * 100))
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{esc(title)}</title>"
             f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><style>{CSS}</style></head><body>"]
    parts.append(f"<h1>{esc(title)}</h1><p class=\"sub\">Bias-corrected, partially pooled lift of display campaigns; "
                 f"{L}% credible intervals; {esc(mode)} fit. An observational estimate, not a randomized test.</p>")
    if mode == "full" and not converged:
        parts.append('<div class="status bad">NOT CONVERGED: the sampler\'s checks failed (see the appendix). Do not '
                     "use these numbers for decisions until a re-fit converges.</div>")
    elif mode == "quick":
        parts.append('<div class="status warn">Quick mode: an approximation for screening. The bias is one distribution '
                     "for the whole portfolio; use the full model for decisions.</div>")
    else:
        parts.append('<div class="status">Convergence checks passed (R-hat, effective sample size, divergences).</div>')
    for m in flags.get("messages", []):
        parts.append(f'<div class="caution">{esc(m)}</div>')
    for w in prep_warnings:
        parts.append(f'<div class="caution">Data preparation: {esc(w)}</div>')
    parts.append("<h2>Summary</h2>")
    parts.append(f"<p><b>Portfolio.</b> {esc(portfolio)}</p>")
    for c, s in paragraphs:
        parts.append(f'<p class="camp"><b>{esc(c)}</b> {esc(s)}</p>')
    cal = calibration_paragraph(t)
    if cal:
        parts.append(f"<p><b>Calibration.</b> {esc(cal)}</p>")
    parts.append(f'<p class="muted">Intervals are {L}% credible intervals: given the model and its assumptions, the '
                 f"value lies in the interval with {L}% probability. Lift is relative to what the seen users would "
                 "have done without the ads.</p>")
    parts.append("<h2>Results by campaign</h2><h3>Lift and incremental conversions</h3>")
    parts.append(_lift_table(t))
    parts.append("<h3>Cost and return</h3>")
    parts.append(_money_table(t))
    tip = _tipping_table(t)
    if tip:
        parts.append("<h3>How much hidden bias each conclusion survives</h3>")
        parts.append(tip)
    if t.tests is not None:
        parts.append("<h3>Randomized tests beside the model</h3><p>Each test's lift among the exposed (converted "
                     "from the whole test group by the exposed share), the model's estimate of that campaign "
                     "without the test, and its prediction of the test's result (the model's uncertainty plus the "
                     "test's own).</p>")
        parts.append(_df_table(t.tests))
    parts.append("<h2>Figures</h2>")
    captions = {
        "lift_by_campaign.png": "Naive (served vs not served), uncorrected (seen vs unseen within cells) and "
                                "bias-corrected lift per campaign, with the pooled portfolio estimate.",
        "placebo_check.png": "Each placebo outcome's seen-vs-unseen effect before and after the bias correction. "
                             "Before: the bias the placebos reveal. After: the same placebo corrected by a bias fitted "
                             "to it too, so near zero by construction; the held-out figure below is the honest check.",
        "placebo_heldout.png": "Each placebo's estimate against its prediction from all the other data (the placebo "
                               "itself left out). About the interval level should fall inside.",
        "randomized_tests.png": "Each randomized test's lift among the exposed, the model's estimate of that "
                                "campaign without the test, and with all tests.",
        "sensitivity.png": "The lift's interval as a target-only bias beyond the placebos' grows (log-odds scale); "
                           "where the lower end crosses zero is the tipping point.",
        "shrinkage.png": "Each campaign alone against the pooled estimate; small campaigns move towards the portfolio.",
        "naive_to_corrected.png": "How each campaign's lift falls from the naive comparison to the bias-corrected one.",
        "return_on_ad_spend.png": "Posterior of return on ad spend (incremental revenue divided by spend).",
        "covariate_balance.png": "Balance of each candidate covariate between seen and unseen users, before "
                                 "(open) and after (filled) stratifying on the screen's suggested cells; "
                                 "dashed line: the 0.1 flag.",
    }
    for name, png in figures.items():
        parts.append(_img(name, png, captions.get(name, name)))
    parts.append("<h2>Assumptions and cautions</h2>")
    parts.extend(f'<p class="caution">{c}</p>' for c in CAUTIONS)
    parts.append('<h2>Words used in this report</h2><dl class="glossary">')
    parts.extend(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in GLOSSARY.items())
    parts.append("</dl>")
    parts.append("<h2>Appendix</h2><h3>Convergence diagnostics</h3>")
    parts.append(_df_table(t.diagnostics))
    if prep_totals:
        parts.append("<h3>Data preparation</h3>")
        parts.append(_df_table(pd.DataFrame([(k.replace("_", " "), v) for k, v in prep_totals.items()],
                                            columns=["item", "count"])))
    if t.prep is not None:
        parts.append(_df_table(t.prep, {"nonviewable share": lambda v: fmt_pct(v, signed=False)}))
    parts.append("<h3>Placebo check</h3>")
    if not t.placebos.empty:
        parts.append(_df_table(t.placebos.drop(columns=["pair"])))
    if t.heldout_placebos is not None:
        parts.append(f"<h3>Each placebo predicted without itself</h3><p>{esc(placebo_heldout_sentence(t))}</p>")
        parts.append(_df_table(t.heldout_placebos))
    if t.predictive is not None:
        L = int(round((t.predictive_level or t.level) * 100))  # the check's own level, set when it was fitted
        inside = float(t.predictive["inside"].mean())
        parts.append(f"<h3>Posterior predictive check</h3><p>Observed conversions by campaign, outcome and arm "
                     f"fall inside their {L}% predictive interval in {inside:.0%} of {len(t.predictive)} groups "
                     "(about {L}% expected; far fewer would mean the model does not fit the data).</p>"
                     .replace("{L}", str(L)))
        parts.append(_df_table(t.predictive))
    if screen is not None:
        suggested, ranking, balance = screen
        parts.append("<h3>Confounder screen</h3><p>For each candidate covariate: the placebo bias (the quick "
                     "mode's pooled placebo effect, log odds) without cells and with cells on it alone, its "
                     "balance between seen and unseen users (standardized mean difference, flagged above 0.1, "
                     "Austin 2009) and its association with the placebo outcomes. Suggested cells: "
                     f"{esc(', '.join(suggested) or '(none)')}.</p>")
        parts.append(_df_table(ranking))
        parts.append("<p>Balance before and after stratifying on the suggested cells (users-weighted mean "
                     "|SMD| over campaigns):</p>")
        parts.append(_df_table(balance))
    parts.append("<h3>Model settings</h3>")
    parts.append(_df_table(t.settings))
    parts.append("<h3>Provenance</h3>")
    parts.append(_df_table(t.provenance, {"value": lambda v: v}))
    parts.append("</body></html>")
    return "\n".join(parts)
