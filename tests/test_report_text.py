"""The report's words and levels: every interval on a page at the level its label says, and money
sentences that read right in every case (invented counts; the references are the posterior draws
themselves, summarised here by numpy, and plain arithmetic on the spend)."""

from __future__ import annotations

import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from liftpool.data_prep import prepare_counts, simulate
from liftpool.models import ModelSettings, fit_counts
from liftpool.reports import build_tables, write_report
from liftpool.reports.money import fmt_count, fmt_int, fmt_money, fmt_pct
from liftpool.reports.text import cost_sentence, portfolio_paragraph


class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.text = []

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def demo_fit():
    data = simulate(seed=5, scale=0.15)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"])
    return fit_counts(res.counts, ModelSettings(seed=8, level=0.9), quick=True), data["spend"]


def test_a_fit_at_90_rendered_at_50_shows_only_50_percent_intervals(demo_fit, tmp_path):
    fit, spend = demo_fit
    out = write_report(fit, tmp_path / "r", spend=spend, level=0.5)
    html = (out / "report.html").read_text()
    p = _Text()
    p.feed(html)
    text = " ".join(p.text)
    # every level named on the page is 50% (a quick fit has no predictive check at its own level)
    named = re.findall(r"(\d+)% (?:interval|credible|lower|upper|predictive|probability)", text)
    assert named and set(named) == {"50"}, sorted(set(named))
    post = fit.idata.posterior
    for camp in [str(c) for c in post.campaign.values]:
        lift = post["lift"].sel(campaign=camp).values.ravel()
        inc = post["incremental_conversions"].sel(campaign=camp).values.ravel()
        lo, hi = np.quantile(lift, [0.25, 0.75])
        ilo, ihi = np.quantile(inc, [0.25, 0.75])
        # the table's main interval and the paragraph's, both at 50%
        assert f"{fmt_pct(lo)}\u00a0to</span> <span class=\"nw\">{fmt_pct(hi)}" in html
        assert f"({fmt_pct(lo)} to {fmt_pct(hi)})" in text
        assert f"(50% interval {fmt_int(ilo)} to {fmt_int(ihi)})" in text
    inc = post["incremental_conversions"].values.sum(axis=-1).ravel()
    cf = post["counterfactual_conversions"].values.sum(axis=-1).ravel()
    plo, phi = np.quantile(inc / cf, [0.25, 0.75])
    assert f"a lift of {fmt_pct(np.median(inc / cf))} ({fmt_pct(plo)} to {fmt_pct(phi)})" in text
    # the CSV carries the level in its rows' meaning: the 50% ends equal the main ends at level 0.5
    csv = pd.read_csv(out / "campaign_results.csv", keep_default_na=False, na_values=[""])
    camp_rows = csv[csv["row"] == "campaign"]
    np.testing.assert_allclose(camp_rows["lift_lower"], camp_rows["lift_lower50"], rtol=1e-12)


def test_report_level_defaults_to_the_fits(demo_fit):
    fit, _ = demo_fit
    t = build_tables(fit)
    assert t.level == fit.settings.level == 0.9
    lift = fit.idata.posterior["lift"].isel(campaign=0).values.ravel()
    assert t.campaigns.loc[0, "lift_upper"] == pytest.approx(np.quantile(lift, 0.95))


ROW = {"spend": 1000.0}


@pytest.mark.parametrize("case, row, expected", [
    ("bounded", {**ROW, "cost_per_incremental_conversion": 10.0, "cost_per_incremental_conversion_lower": 8.0,
                 "cost_per_incremental_conversion_upper": 14.0},
     " Each extra conversion cost $10.00 ($8.00 to $14.00)."),
    ("interval reaches zero", {**ROW, "cost_per_incremental_conversion": 25.0,
                               "cost_per_incremental_conversion_lower": 9.0,
                               "cost_per_incremental_conversion_upper": np.inf},
     " Each extra conversion most likely cost $25.00, at best $9.00; the interval includes no added conversions at "
     "all, so the cost has no upper bound."),
    ("median at or below zero", {**ROW, "cost_per_incremental_conversion": np.inf,
                                 "cost_per_incremental_conversion_lower": 40.0,
                                 "cost_per_incremental_conversion_upper": np.inf},
     " It most likely added no conversions, so no cost per extra conversion can be given (at the favourable end of "
     "the interval it cost $40.00 each); its spend was $1,000."),
    ("all at or below zero", {**ROW, "cost_per_incremental_conversion": np.inf,
                              "cost_per_incremental_conversion_lower": np.inf,
                              "cost_per_incremental_conversion_upper": np.inf},
     " It most likely added no conversions, so no cost per extra conversion can be given; its spend was $1,000."),
    ("zero spend", {"spend": 0.0, "cost_per_incremental_conversion": 0.0,
                    "cost_per_incremental_conversion_lower": 0.0, "cost_per_incremental_conversion_upper": 0.0},
     " Its spend is zero, so it has no cost per extra conversion and no return on spend."),
    ("no spend row", {"spend": np.nan}, ""),
])
def test_cost_sentence_reads_right_in_every_case(case, row, expected):
    # the sentences are this project's; the numbers are plain arithmetic (spend / conversions)
    assert cost_sentence(row, "USD") == expected, case
    assert "not bounded" not in cost_sentence(row, "USD")


def test_cost_quantiles_map_from_the_incremental_conversions():
    # spend / x is decreasing for x > 0, so its quantiles are spend over the opposite quantiles of x
    # (a property of quantiles under monotone maps: general probability, no source needed)
    from liftpool.models.estimands import cost_per_incremental

    rng = np.random.default_rng(1)
    inc = rng.normal(50, 10, 100_000)
    med, lo, hi = cost_per_incremental(1000.0, (np.median(inc), *np.quantile(inc, [0.05, 0.95])))
    cost = 1000.0 / inc
    assert med == pytest.approx(np.median(cost), rel=1e-3)
    assert lo == pytest.approx(np.quantile(cost, 0.05), rel=1e-3)
    assert hi == pytest.approx(np.quantile(cost, 0.95), rel=1e-3)
    assert cost_per_incremental(1000.0, (5.0, -1.0, 9.0)) == (200.0, 1000.0 / 9.0, np.inf)


def test_counts_have_the_right_noun():
    assert fmt_count(1) == "1 conversion"
    assert fmt_count(1204.4) == "1,204 conversions"
    assert fmt_count(0) == "0 conversions"
    assert fmt_count(1, "user", "users") == "1 user"


def _counts_without_placebos():
    rows = []
    for camp, (x1, x0) in {"a": (60, 40), "b": (55, 45)}.items():
        for cell in ("c1", "c2"):
            rows += [(camp, cell, "seen", "buy", "target", 2000, x1), (camp, cell, "unseen", "buy", "target", 2000, x0)]
    return pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])


def test_spend_without_placebos_says_why_no_costs(tmp_path):
    fit = fit_counts(_counts_without_placebos(), ModelSettings(seed=3), quick=True)
    spend = pd.DataFrame({"campaign": ["a", "b"], "spend": [500.0, 700.0]})
    t = build_tables(fit, spend=spend)
    text = portfolio_paragraph(t)
    assert "A spend file was given, but costs and returns need the bias-corrected estimate" in text
    html = (write_report(fit, tmp_path / "r", spend=spend) / "report.html").read_text()
    assert "No spend file was given" not in html
    assert "A spend file was given, but costs and returns need the bias-corrected estimate" in html


def test_a_campaign_missing_from_spend_is_named_and_left_out_of_the_total(demo_fit):
    fit, spend = demo_fit
    dropped = str(fit.idata.posterior.campaign.values[0])
    t = build_tables(fit, spend=spend[spend["campaign"] != dropped])
    p = t.pooled("portfolio")
    assert p["spend"] == pytest.approx(spend[spend["campaign"] != dropped]["spend"].sum())
    assert f"leaving out {dropped}" in portfolio_paragraph(t)
    row = t.campaigns.set_index("campaign").loc[dropped]
    assert "not in the spend file" in row["notes"]


def test_spread_sentence_follows_lift_sd(demo_fit):
    fit, _ = demo_fit
    t = build_tables(fit)
    sd = fit.idata.posterior["lift_sd"].values.ravel()
    lo, hi = np.quantile(sd, [0.05, 0.95])
    text = portfolio_paragraph(t)
    if lo > 0.02:
        assert f"The campaigns' true lifts differ: their spread is {lo:.2f} to {hi:.2f}" in text
    else:
        assert f"their spread could be close to zero ({lo:.2f} to {hi:.2f}" in text
    # and the other branch, by construction: a spread pinned at zero
    t.lift_spread = {"median": 0.001, "lower": 0.0, "upper": 0.01}
    assert "cannot tell whether the campaigns' true lifts differ" in portfolio_paragraph(t)
    t.lift_spread = {"median": 0.3, "lower": 0.2, "upper": 0.4}
    assert re.search(r"true lifts differ: their spread is 0\.20 to 0\.40", portfolio_paragraph(t))


def test_money_formatting_of_a_hostile_currency_is_refused(demo_fit):
    from liftpool.data_prep.errors import InputError

    fit, spend = demo_fit
    with pytest.raises(InputError, match="not a three-letter ISO 4217 code"):
        build_tables(fit, spend=spend, currency="<svg/onload=alert(1)>")
    assert fmt_money(12.5, "EUR") == "€12.50"


def test_importing_the_reports_leaves_the_plotting_backend_alone():
    # a notebook's backend must survive `import liftpool.reports` (the figures draw on their own canvas)
    import subprocess
    import sys

    code = ("import matplotlib; matplotlib.use('svg'); import liftpool.reports, liftpool.reports.planning, "
            "liftpool.reports.screening, liftpool.reports.compare; print(matplotlib.get_backend())")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "svg"


def test_formula_and_mathtext_names_are_inert(tmp_path):
    # OWASP "CSV Injection": a text cell starting with = + - @ runs as a formula in a spreadsheet
    import openpyxl

    rows = []
    names = {"=1+1": "@SUM(A1)", "+cmd": "$\\frac{x}{$"}
    for camp, placebo in names.items():
        for arm, x in (("seen", 40), ("unseen", 25)):
            rows += [(camp, "all", arm, f"t {camp}", "target", 3000, x), (camp, "all", arm, placebo, "placebo", 3000, 20)]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    fit = fit_counts(counts, ModelSettings(seed=2), quick=True)
    out = write_report(fit, tmp_path / "r")  # the mathtext name must not break the figures
    wb = openpyxl.load_workbook(out / "tables.xlsx")
    cells = [c for ws in wb.worksheets for row in ws.iter_rows() for c in row]
    assert not [c.coordinate for c in cells if c.data_type == "f"]
    assert any(c.value == "=1+1" and c.data_type == "s" for c in cells)
    text = (out / "campaign_results.csv").read_text()
    assert "'=1+1" in text and "'+cmd" in text and "\n=1+1" not in text
    placebo = (out / "placebo_check.csv").read_text()
    assert "'@SUM(A1)" in placebo


@pytest.mark.slow
def test_a_300_campaign_report_stays_readable_and_small(tmp_path):
    # invented counts (the shape suite's story): every figure capped at MAX_ROWS rows, the page < 3 MB
    from PIL import Image

    from liftpool.data_prep.shapes import Shape, shape_counts
    from liftpool.reports.figures import MAX_ROWS

    sh = Shape("big", campaigns=300, cells=(20, 20), placebos=3, users=(6000, 6000), rate=(0.02, 0.04))
    counts, _ = shape_counts(sh, 1)
    fit = fit_counts(counts, ModelSettings(), quick=True)
    spend = pd.DataFrame({"campaign": sorted(counts.campaign.unique()), "spend": 1000.0, "value_per_conversion": 20.0})
    out = write_report(fit, tmp_path / "r", spend=spend)
    assert (out / "report.html").stat().st_size < 3e6
    for png in (out / "figures").iterdir():
        w, h = Image.open(png).size
        assert h < 0.42 * (MAX_ROWS + 2) * 130 + 400, (png.name, h)  # inches x dpi, with the margins
    csv = pd.read_csv(out / "campaign_results.csv")
    assert (csv["row"] == "campaign").sum() == 300  # the tables keep every campaign


def test_every_technical_term_on_the_page_is_in_its_glossary(demo_fit, tmp_path):
    from pathlib import Path

    from liftpool.reports.glossary import GLOSSARY

    fit, spend = demo_fit
    html = (write_report(fit, tmp_path / "r", spend=spend) / "report.html").read_text()
    p = _Text()
    p.feed(html)
    text = " ".join(p.text)
    glossary = text[text.index("Words used in this report"):]
    for term, meaning in GLOSSARY.items():
        assert term in glossary and meaning in glossary, term
    # the jargon a finance reader meets in reports (the full fit's appendix adds R-hat and ESS), each explained
    body = text[:text.index("Words used in this report")].lower()
    for word in ("all campaigns", "a new campaign (predictive)", "credible interval", "placebo", "cells",
                 "return on ad spend"):
        assert word in body, word
    for word in ("R-hat", "effective sample size", "divergences", "(portfolio)", "(new campaign)", "log odds",
                 "credible interval", "placebo", "cells", "return on ad spend", "partial pooling"):
        assert any(word.lower() in (k + v).lower() for k, v in GLOSSARY.items()), word
    # docs/glossary.md is the same list, word for word
    doc = (Path(__file__).parents[1] / "docs" / "glossary.md").read_text()
    for term, meaning in GLOSSARY.items():
        assert f"**{term}**: {meaning}" in doc, term


def test_one_rule_decides_could_be_zero_and_small_sample_for_every_campaign(demo_fit, tmp_path):
    from liftpool.reports.text import SMALL_SAMPLE_CONVERSIONS, campaign_paragraphs

    fit, spend = demo_fit
    t = build_tables(fit, spend=spend)
    paras = dict(campaign_paragraphs(t, fit.flags.to_dict()))
    post = fit.idata.posterior
    cd = fit.idata.constant_data
    seen_zero = seen_small = 0
    for c in [str(x) for x in post.campaign.values]:
        # the references: the lift draws' own lower quantile, and the counts table's target conversions
        lo = np.quantile(post["lift"].sel(campaign=c).values.ravel(), 0.05)
        n = int(cd["target_conversions_seen"].sel(campaign=c) + cd["target_conversions_unseen"].sel(campaign=c))
        assert ("cannot rule out that it added nothing" in paras[c]) == (lo <= 0), (c, lo)
        assert ("Its own data are thin" in paras[c]) == (n < SMALL_SAMPLE_CONVERSIONS), (c, n)
        seen_zero += lo <= 0
        seen_small += n < SMALL_SAMPLE_CONVERSIONS
    assert 0 < seen_zero < len(paras) or seen_small > 0  # the demo exercises at least one caution


def test_without_an_unexposed_arm_nothing_claims_a_naive_lift(monkeypatch):
    # counts with seen and unseen users only: no naive comparison exists, so neither the chart's title
    # nor the table may name one
    from liftpool.reports import figures as F
    from liftpool.reports.html import _lift_table

    rows = []
    for camp, (x1, x0) in {"a": (60, 40), "b": (55, 45), "c": (70, 50)}.items():
        for cell in ("c1", "c2"):
            for o, role, k in (("buy", "target", 1.0), ("visit", "placebo", 0.8)):
                rows += [(camp, cell, "seen", o, role, 2000, round(x1 * k)), (camp, cell, "unseen", o, role, 2000,
                                                                              round(x0 * k))]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    fit = fit_counts(counts, ModelSettings(seed=3), quick=True)
    t = build_tables(fit)
    titles = []
    monkeypatch.setattr(F, "png_bytes", lambda fig: titles.append(fig.axes[0].get_title()) or b"")
    F.make_figures(t)
    lift_title = next(x for x in titles if x.startswith("Lift by campaign"))
    assert lift_title == "Lift by campaign: uncorrected and bias-corrected"
    assert "naive" not in _lift_table(t)


def test_compare_keeps_a_small_change_of_bias_small(monkeypatch):
    # two fits of nearly the same data: the bias axis spans at least MIN_BIAS_SPAN log odds, so a change
    # of a hundredth does not fill the panel
    from liftpool.reports import compare as C

    data = simulate(seed=5, scale=0.1)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"])
    a = fit_counts(res.counts, ModelSettings(seed=1), quick=True)
    b = fit_counts(res.counts, ModelSettings(seed=2), quick=True)
    figs = []
    monkeypatch.setattr(C, "png_bytes", lambda fig: figs.append(fig) or b"")
    table, _ = C.compare_fits(a, b, "A", "B")
    lo, hi = figs[0].axes[1].get_xlim()
    assert hi - lo >= C.MIN_BIAS_SPAN - 1e-12
    moved = table.filter(like="bias median").to_numpy(float)
    assert np.nanmax(np.abs(moved[:, 1] - moved[:, 0])) < 0.25 * (hi - lo)  # each campaign's change is small
