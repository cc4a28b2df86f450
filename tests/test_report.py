"""The finance report: numbers recomputed independently from the posterior draws, files, escaping, a browser."""

from __future__ import annotations

import re
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import openpyxl
import pandas as pd
import pytest

from liftpool.data_prep import prepare_counts, simulate
from liftpool.models import ModelSettings, fit_counts
from liftpool.reports import write_report
from liftpool.reports.money import fmt_int, fmt_money, fmt_pct

EVIL = "<script>alert(1)</script>"


@pytest.fixture(scope="module", params=["quick", pytest.param("full", marks=pytest.mark.slow)])
def small(tmp_path_factory, request):
    data = simulate(seed=5, scale=0.15)
    # rename one campaign to a hostile string: it must come out escaped everywhere
    for k in ("impressions", "outcomes", "spend", "truth"):
        data[k]["campaign"] = data[k]["campaign"].replace("tool-club", EVIL)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"])
    # every check below runs on a quick fit and on a full one (the same estimands, two routes)
    fit = fit_counts(res.counts, ModelSettings(seed=8), quick=request.param == "quick")
    out = write_report(fit, tmp_path_factory.mktemp("r") / "report", spend=data["spend"], prep_summary=res.summary)
    return fit, res, data["spend"], out


def test_report_files(small):
    _, _, _, out = small
    names = {p.name for p in out.iterdir()}
    assert {"report.html", "tables.xlsx", "campaign_results.csv", "placebo_check.csv", "shrinkage.csv",
            "convergence.csv", "model_settings.csv", "provenance.csv", "data_preparation.csv", "figures"} <= names
    figs = {p.name for p in (out / "figures").iterdir()}
    assert {"lift_by_campaign.png", "placebo_check.png", "shrinkage.png", "naive_to_corrected.png",
            "return_on_ad_spend.png"} <= figs
    for f in (out / "figures").iterdir():
        assert f.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_every_number_equals_the_posterior_recomputed(small):
    # an independent route: quantiles of the posterior draws by numpy, the users from the counts table,
    # the spend from the spend file; the CSV is in natural units (fractions, conversions, money)
    fit, res, spend, out = small
    table = pd.read_csv(out / "campaign_results.csv", keep_default_na=False, na_values=[""]).set_index("campaign")
    post = fit.idata.posterior
    sp = spend.set_index("campaign")
    c = res.counts
    camps = [str(x) for x in post.campaign.values]
    for camp in camps:
        r = table.loc[camp]
        assert r["row"] == "campaign"
        lift = post["lift"].sel(campaign=camp).values.ravel()
        inc = post["incremental_conversions"].sel(campaign=camp).values.ravel()
        unc = post["lift_uncorrected"].sel(campaign=camp).values.ravel()
        assert r["lift"] == pytest.approx(np.median(lift))
        assert r["lift_lower"] == pytest.approx(np.quantile(lift, 0.05))
        assert r["lift_upper"] == pytest.approx(np.quantile(lift, 0.95))
        assert r["lift_lower50"] == pytest.approx(np.quantile(lift, 0.25))
        assert r["lift_uncorrected"] == pytest.approx(np.median(unc))
        assert r["incremental_conversions"] == pytest.approx(np.median(inc))
        assert r["p_lift_positive"] == pytest.approx(np.mean(lift > 0))
        s, v = sp.loc[camp, "spend"], sp.loc[camp, "value_per_conversion"]
        assert r["spend"] == pytest.approx(s)
        assert r["cost_per_incremental_conversion"] == pytest.approx(s / np.median(inc))
        assert r["cost_per_incremental_conversion_lower"] == pytest.approx(s / np.quantile(inc, 0.95))
        assert r["return_on_ad_spend"] == pytest.approx(np.median(inc * v / s))
        assert r["p_paid_for_itself"] == pytest.approx(np.mean(inc * v > s))
        # users straight from the counts table (not from the fit)
        t = c[(c.campaign == camp) & (c.role == "target")]
        assert r["users_seen"] == t[t.arm == "seen"].users.sum()
        assert r["users_unseen"] == t[t.arm == "unseen"].users.sum()
        pc = res.summary.campaigns.set_index("campaign").loc[camp]
        share = (pc.measured_impressions - pc.viewable_impressions) / pc.measured_impressions
        assert r["nonviewable_share"] == pytest.approx(share)
    # the portfolio row: totals over campaigns, draw by draw
    p = table[table["row"] == "portfolio"].iloc[0]
    inc = post["incremental_conversions"].values.sum(axis=-1).ravel()
    cf = post["counterfactual_conversions"].values.sum(axis=-1).ravel()
    assert p["incremental_conversions"] == pytest.approx(np.median(inc))
    assert p["lift"] == pytest.approx(np.median(inc / cf))
    assert p["lift_upper"] == pytest.approx(np.quantile(inc / cf, 0.95))
    total = sp.loc[camps, "spend"].sum()
    assert p["spend"] == pytest.approx(total)
    rev = (post["incremental_conversions"].values * sp.loc[camps, "value_per_conversion"].to_numpy()).sum(axis=-1)
    assert p["return_on_ad_spend"] == pytest.approx(np.median(rev.ravel() / total))
    assert p["users_seen"] == table.loc[camps, "users_seen"].sum()
    # a new campaign: exp(Normal(lift_mean, lift_sd)) - 1, here from fresh draws (Monte Carlo tolerance)
    n = table[table["row"] == "new campaign"].iloc[0]
    rng = np.random.default_rng(0)
    lm, ls = post["lift_mean"].values.ravel(), post["lift_sd"].values.ravel()
    i = rng.integers(0, lm.size, 200_000)
    ref = np.expm1(lm[i] + ls[i] * rng.standard_normal(i.size))
    # within 4 Monte Carlo standard errors of the fit's own draws' quantiles (arviz.mcse, quantile method;
    # the draws of a full fit are autocorrelated) plus the reference's own (200,000 draws)
    import arviz as az

    own = fit.estimands["lift"].sel(unit="(new campaign)").values
    for key, q in (("lift", 0.5), ("lift_lower", 0.05), ("lift_upper", 0.95)):
        tol = 4 * float(az.mcse(own, method="quantile", prob=q)) + 0.005
        assert n[key] == pytest.approx(np.quantile(ref, q), abs=tol), key


def test_xlsx_natural_units_formats_and_pooled_rows(small):
    _, _, _, out = small
    wb = openpyxl.load_workbook(out / "tables.xlsx")
    assert {"campaign_results", "placebo_check", "shrinkage", "convergence", "model_settings", "provenance",
            "data_preparation", "definitions"} <= set(wb.sheetnames)
    ws = wb["campaign_results"]
    heads = [c.value for c in ws[1]]
    rows = list(ws.iter_rows(min_row=2, values_only=True))
    sheet = pd.DataFrame(rows, columns=heads)
    csv = pd.read_csv(out / "campaign_results.csv", keep_default_na=False, na_values=[""])
    assert list(sheet["row"]) == list(csv["row"]) and {"portfolio", "new campaign"} <= set(sheet["row"])
    for key, head in (("lift", "bias-corrected lift (median)"), ("incremental_conversions",
                      "incremental conversions (median)"), ("return_on_ad_spend", "return on ad spend (median)"),
                      ("p_paid_for_itself", "P(paid for itself)"), ("users_seen", "users seen")):
        np.testing.assert_allclose(sheet[head].astype(float), csv[key].astype(float), rtol=1e-12)
    assert "spend (USD)" in heads and ws.freeze_panes == "B2"
    col = {h: i for i, h in enumerate(heads)}
    first = list(ws.iter_rows(min_row=2, max_row=2))[0]
    assert first[col["bias-corrected lift (median)"]].number_format == "+0.0%;-0.0%;0.0%"
    assert first[col["spend (USD)"]].number_format == '"$"#,##0.00'
    assert first[col["users seen"]].number_format == "#,##0"
    # never inf or NaN in a cell: empty instead
    for r in rows:
        for v in r:
            assert not (isinstance(v, float) and not np.isfinite(v))
    defs = {r[1]: r for r in wb["definitions"].iter_rows(min_row=2, values_only=True)}
    assert "lift" in defs and "fraction" not in str(defs["lift"][2])  # unit kind printed (pct)


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.srcs, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.srcs += [v for k, v in attrs if k in ("src", "href") and v]

    def handle_data(self, data):
        self.text.append(data)


def test_html_parses_is_self_contained_and_escaped(small):
    _, _, _, out = small
    html = (out / "report.html").read_text()
    p = _Collect()
    p.feed(html)
    assert "script" not in p.tags
    figs = sorted(f.name for f in (out / "figures").iterdir())
    # every figure embedded, the held-out placebos and the sensitivity figure among them (no tests here)
    assert {"placebo_heldout.png", "sensitivity.png"} <= set(figs) and "randomized_tests.png" not in figs
    assert p.tags.count("img") == len(figs) and all(s.startswith("data:image/png;base64,") for s in p.srcs)
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert EVIL not in html
    text = " ".join(p.text)
    assert EVIL in text  # the name is shown, as text
    assert "observational estimate, not a randomized test" in text
    assert "Assumptions and cautions" in text and "placebo outcomes sharing the target" in text
    assert "Use randomized tests where they are affordable" in text


def test_plain_language_summary_numbers(small):
    fit, _, spend, out = small
    html = (out / "report.html").read_text()
    post = fit.idata.posterior["incremental_conversions"]
    # a campaign whose interval is above zero (so its cost is bounded): the one with the highest lower end
    camp = str(post.campaign.values[int(np.argmax(post.quantile(0.05, dim=("chain", "draw")).values))])
    inc = post.sel(campaign=camp).values.ravel()
    s = spend.set_index("campaign").loc[camp, "spend"]
    assert f"most likely added {round(float(np.median(inc))):,} conversions" in html
    # the cost sentence from the spend file and the posterior (bounded here: the interval is above zero)
    lo, hi = np.quantile(inc, [0.05, 0.95])
    assert lo > 0
    assert (f"Each extra conversion cost {fmt_money(s / np.median(inc))} ({fmt_money(s / hi)} to "
            f"{fmt_money(s / lo)})") in html


def test_not_converged_is_on_the_first_screen(tmp_path):
    rows = [("a", "all", "seen", "t", "target", 1000, 30), ("a", "all", "unseen", "t", "target", 1000, 20),
            ("a", "all", "seen", "p", "placebo", 1000, 25), ("a", "all", "unseen", "p", "placebo", 1000, 20),
            ("b", "all", "seen", "t2", "target", 900, 25), ("b", "all", "unseen", "t2", "target", 900, 20)]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    from liftpool.models.errors import LiftpoolWarning

    with pytest.warns(LiftpoolWarning, match="the fit did not converge"):  # said to the caller, too
        fit = fit_counts(counts, ModelSettings(chains=2, draws=20, tune=20, seed=1))
    assert not fit.converged
    html = (write_report(fit, tmp_path / "r") / "report.html").read_text()
    assert html.index("NOT CONVERGED") < html.index("<h2>Summary</h2>")
    with pytest.raises(Exception, match="never written over"):
        write_report(fit, tmp_path / "r")


def test_money_and_percent_formatting():
    # thousands separators (common practice, no source)
    assert fmt_money(1234567.8) == "$1,234,568"
    assert fmt_money(8.204) == "$8.20"
    assert fmt_money(2500, "EUR") == "€2,500"
    assert fmt_money(2500, "SEK") == "SEK 2,500"
    assert fmt_money(float("inf")) == "not bounded"
    assert fmt_pct(0.1234) == "+12.3%"


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (.ci/run installs Debian's chromium)")
def test_real_browser_renders_without_errors(small, tmp_path):
    _, _, _, out = small
    png = tmp_path / "page.png"
    r = subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr", "--v=0",
         "--window-size=1000,2600", f"--screenshot={png}", (out / "report.html").as_uri()],
        capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
    assert png.exists() and png.stat().st_size > 20_000
    bad = [ln for ln in r.stderr.splitlines()
           if "CONSOLE" in ln or "Failed to load resource" in ln or "net::ERR" in ln or "Uncaught" in ln]
    assert not bad, bad


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (.ci/run installs Debian's chromium)")
@pytest.mark.parametrize("paper", ["A4", "letter"])
def test_printed_tables_fit_the_page_and_never_break_a_number_or_a_name(small, tmp_path, paper):
    # printed by a real browser on A4 and on Letter, and read back from the PDF (pypdf): every number of
    # the results table is one whole word, every campaign name breaks (if at all) only after - _ . /,
    # and the last columns are on the page
    from pypdf import PdfReader

    fit, _, _, out = small
    page = tmp_path / f"report_{paper}.html"
    page.write_text((out / "report.html").read_text().replace("@page { size: auto;", f"@page {{ size: {paper};"))
    pdf = tmp_path / f"report_{paper}.pdf"
    r = subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={tmp_path / 'profile'}", "--no-pdf-header-footer", f"--print-to-pdf={pdf}",
         page.as_uri()], capture_output=True, text=True, timeout=180)
    assert r.returncode == 0 and pdf.exists(), r.stderr[-2000:]
    reader = PdfReader(pdf)
    w, h = (float(x) for x in reader.pages[0].mediabox.upper_right)
    assert (round(w), round(h)) == {"A4": (595, 842), "letter": (612, 792)}[paper]
    text = "\n".join(p.extract_text() for p in reader.pages)
    words = set(text.split())
    results = pd.read_csv(out / "campaign_results.csv", keep_default_na=False, na_values=[""])
    for _, row in results[results["row"] == "campaign"].iterrows():
        for v in (fmt_int(row["users_seen"]), fmt_int(row["users_unseen"]), fmt_pct(row["lift"])):
            assert v in words, (paper, row["campaign"], v)
        name = str(row["campaign"]).lstrip("'")
        if name.isascii() and "<" not in name:  # the hostile name is checked for escaping elsewhere
            joined = re.sub(r"([-_./])\s*\n", r"\1", text)
            assert name in joined, (paper, name)
    for header in ("P(lift", "P(paid"):  # the last column of each results table
        assert header in text, (paper, header)


def _overlaps(boxes):
    return [(i, j) for i in range(len(boxes)) for j in range(i + 1, len(boxes)) if boxes[i].overlaps(boxes[j])]


def test_figure_labels_and_ticks_never_overlap(small, monkeypatch):
    # matplotlib's own layout: every name placed in the shrinkage and naive-to-corrected figures, and
    # every tick label of the lift axes, has a bounding box clear of the others
    from liftpool.reports import build_tables
    from liftpool.reports import figures as F

    fit, _, spend, _ = small
    drawn = {}

    def keep(fig):
        drawn[fig.axes[0].get_title()[:20]] = fig
        return b""

    monkeypatch.setattr(F, "png_bytes", keep)
    F.make_figures(build_tables(fit, spend=spend))
    assert len(drawn) >= 4
    for title, fig in drawn.items():
        renderer = fig.canvas.get_renderer()
        fig.draw(renderer)
        for ax in fig.axes:
            names = [a.get_window_extent(renderer) for a in ax.texts if a.get_text()]
            assert not _overlaps(names), (title, [a.get_text() for a in ax.texts])
            for labels in (ax.get_xticklabels(), ax.get_yticklabels()):
                boxes = [t.get_window_extent(renderer) for t in labels if t.get_text() and t.get_visible()]
                assert not _overlaps(boxes), (title, [t.get_text() for t in labels])
    # the shrinkage figure names its campaigns (those it can place), the steps figure all of them
    steps = next(f for t, f in drawn.items() if t.startswith("From naive"))
    assert len([a for a in steps.axes[0].texts if a.get_text()]) == len(fit.idata.posterior.campaign)
