"""Write a report folder: report.html, tables.xlsx, one CSV per table, figures as PNG."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd

from liftpool.data_prep.counts import PrepSummary
from liftpool.data_prep.errors import InputError
from liftpool.data_prep.io import atomic_folder
from liftpool.models.fit import FitResult, load_fit
from liftpool.reports.figures import make_figures
from liftpool.reports.html import render_html
from liftpool.reports.spend import check_spend
from liftpool.reports.tables import ReportTables, build_tables
from liftpool.reports.text import campaign_paragraphs, portfolio_paragraph

__all__ = ["write_report", "write_xlsx"]


def write_xlsx(tables: dict[str, pd.DataFrame], path: Path) -> None:
    """One sheet per table (units are in the column headers)."""
    with pd.ExcelWriter(path, engine="openpyxl") as xw:
        for name, df in tables.items():
            out = df.copy()
            for c in out.columns:
                if out[c].dtype == object:
                    out[c] = out[c].astype(str)
            out.to_excel(xw, sheet_name=name[:31], index=False)
            ws = xw.sheets[name[:31]]
            for i, col in enumerate(out.columns, start=1):
                ws.column_dimensions[ws.cell(row=1, column=i).column_letter].width = min(48, max(10, len(str(col)) + 2))


def write_report(
    fit: FitResult | str | os.PathLike,
    out: str | os.PathLike,
    spend: pd.DataFrame | None = None,
    prep_summary: PrepSummary | None = None,
    currency: str = "USD",
    level: float | None = None,
    title: str = "Display advertising lift report",
    provenance: dict | None = None,
    screen=None,
) -> Path:
    """Write the report folder, atomically; it must not exist yet (or be empty).

    Parameters
    ----------
    fit : FitResult or path of a fit folder
    out : path of the new report folder
    spend : DataFrame, optional
        ``campaign, spend[, value_per_conversion]``.
    prep_summary : PrepSummary, optional
    currency : str
    level : float, optional
        Interval level (the fit's by default).
    title : str
    provenance : dict, optional
        Extra provenance rows (e.g. input file hashes).
    screen : ScreenResult, optional
        A confounder screen: its ranking and balance tables go into the appendix and the XLSX.

    Returns
    -------
    Path of the folder written.
    """
    if not isinstance(fit, FitResult):
        fit = load_fit(fit)
    out = Path(out)
    if out.exists() and any(out.iterdir()):
        raise InputError(problem="the folder already holds files; a report is never written over another",
                         file=str(out), fix="choose a new --out folder")
    camps = [str(c) for c in fit.idata.posterior.campaign.values]
    if spend is not None:
        spend = check_spend(spend, "spend table", campaigns=camps)
    prov = dict(provenance or {})
    if prep_summary is not None:
        for k, v in (prep_summary.totals.get("input_sha256") or {}).items():
            prov[f"SHA-256 of {k}"] = v
    tables: ReportTables = build_tables(fit, spend=spend, prep_campaigns=None if prep_summary is None
                                        else prep_summary.campaigns, currency=currency, level=level, provenance=prov)
    figures = make_figures(tables)
    screen_tables = None
    if screen is not None:
        from liftpool.reports.screening import appendix_table, balance_figure

        figures["covariate_balance.png"] = balance_figure(screen)
        screen_tables = (screen.suggested, *appendix_table(screen))
    flags = fit.flags.to_dict()
    totals = None
    if prep_summary is not None:
        totals = {k: v for k, v in prep_summary.totals.items() if not isinstance(v, dict)}
    html = render_html(tables, figures, campaign_paragraphs(tables, flags), portfolio_paragraph(tables),
                       fit.converged, fit.mode, flags, title, totals, screen=screen_tables)
    with atomic_folder(out) as tmp:
        (tmp / "report.html").write_text(html, encoding="utf-8")
        named = tables.named()
        if screen_tables is not None:
            _, named["screen_ranking"], named["screen_balance"] = screen_tables
        write_xlsx(named, tmp / "tables.xlsx")
        for name, df in named.items():
            df.to_csv(tmp / f"{name}.csv", index=False)
        (tmp / "figures").mkdir()
        for name, png in figures.items():
            (tmp / "figures" / name).write_bytes(png)
    return out
