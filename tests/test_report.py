"""The finance report: numbers recomputed independently from the posterior draws, files, escaping, a browser."""

from __future__ import annotations

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
from liftpool.reports.money import fmt_money, fmt_pct

EVIL = "<script>alert(1)</script>"


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    data = simulate(seed=5, scale=0.15)
    # rename one campaign to a hostile string: it must come out escaped everywhere
    for k in ("impressions", "outcomes", "spend", "truth"):
        data[k]["campaign"] = data[k]["campaign"].replace("tool-club", EVIL)
    res = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"])
    fit = fit_counts(res.counts, ModelSettings(seed=8), quick=True)
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
    fit, res, spend, out = small
    table = pd.read_csv(out / "campaign_results.csv").set_index("campaign")
    post = fit.idata.posterior
    sp = spend.set_index("campaign")
    c = res.counts
    for camp in table.index:
        r = table.loc[camp]
        lift = post["lift"].sel(campaign=camp).values.ravel()
        inc = post["incremental_conversions"].sel(campaign=camp).values.ravel()
        unc = post["lift_uncorrected"].sel(campaign=camp).values.ravel()
        assert r["lift, median (%)"] == pytest.approx(100 * np.median(lift))
        assert r["lift, 90% lower (%)"] == pytest.approx(100 * np.quantile(lift, 0.05))
        assert r["lift, 90% upper (%)"] == pytest.approx(100 * np.quantile(lift, 0.95))
        assert r["lift, 50% lower (%)"] == pytest.approx(100 * np.quantile(lift, 0.25))
        assert r["uncorrected lift, median (%)"] == pytest.approx(100 * np.median(unc))
        assert r["incremental conversions, median"] == pytest.approx(np.median(inc))
        assert r["P(lift > 0)"] == pytest.approx(np.mean(lift > 0))
        s, v = sp.loc[camp, "spend"], sp.loc[camp, "value_per_conversion"]
        assert r["spend (USD)"] == pytest.approx(s)
        med = np.median(inc)
        assert r["cost per incremental conversion, median (USD)"] == pytest.approx(s / med)
        assert r["return on ad spend, median (x)"] == pytest.approx(np.median(inc * v / s))
        assert r["P(return > 1)"] == pytest.approx(np.mean(inc * v > s))
        # users straight from the counts table (not from the fit)
        t = c[(c.campaign == camp) & (c.role == "target")]
        assert r["users seen"] == t[t.arm == "seen"].users.sum()
        assert r["users unseen"] == t[t.arm == "unseen"].users.sum()
        pc = res.summary.campaigns.set_index("campaign").loc[camp]
        share = (pc.measured_impressions - pc.viewable_impressions) / pc.measured_impressions
        assert r["non-viewable share of measured impressions (%)"] == pytest.approx(100 * share)


def test_xlsx_has_the_same_numbers(small):
    _, _, _, out = small
    wb = openpyxl.load_workbook(out / "tables.xlsx", read_only=True)
    assert {"campaign_results", "placebo_check", "shrinkage", "convergence", "model_settings", "provenance",
            "data_preparation"} <= set(wb.sheetnames)
    rows = list(wb["campaign_results"].values)
    sheet = pd.DataFrame(rows[1:], columns=rows[0]).set_index("campaign")
    csv = pd.read_csv(out / "campaign_results.csv").set_index("campaign")
    for col in ("lift, median (%)", "incremental conversions, median", "return on ad spend, median (x)",
                "P(return > 1)", "users seen"):
        np.testing.assert_allclose(sheet[col].astype(float), csv[col].astype(float), rtol=1e-12)
    assert any("(USD)" in str(h) for h in rows[0])  # units in the headers


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
    assert p.tags.count("img") == 5 and all(s.startswith("data:image/png;base64,") for s in p.srcs)
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
    camp = "spring-planters"
    inc = fit.idata.posterior["incremental_conversions"].sel(campaign=camp).values.ravel()
    s = spend.set_index("campaign").loc[camp, "spend"]
    assert f"most likely added {round(float(np.median(inc))):,} conversions" in html
    assert f"Each extra conversion cost {fmt_money(s / np.median(inc))}" in html


def test_not_converged_is_on_the_first_screen(tmp_path):
    rows = [("a", "all", "seen", "t", "target", 1000, 30), ("a", "all", "unseen", "t", "target", 1000, 20),
            ("a", "all", "seen", "p", "placebo", 1000, 25), ("a", "all", "unseen", "p", "placebo", 1000, 20),
            ("b", "all", "seen", "t2", "target", 900, 25), ("b", "all", "unseen", "t2", "target", 900, 20)]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
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
