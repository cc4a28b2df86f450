"""Write a report folder: report.html, tables.xlsx, one CSV per table, figures as PNG."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from liftpool.data_prep.counts import PrepSummary
from liftpool.data_prep.errors import InputError
from liftpool.data_prep.io import atomic_folder, spreadsheet_safe
from liftpool.models.fit import FitResult, load_fit
from liftpool.reports.figures import make_figures
from liftpool.reports.html import render_html
from liftpool.reports.money import currency_symbol
from liftpool.reports.spend import check_spend
from liftpool.reports.tables import COLUMNS, ReportTables, build_tables, label
from liftpool.reports.text import campaign_paragraphs, portfolio_paragraph

__all__ = ["write_report", "write_xlsx"]


#: Excel number format of each number kind of reports.tables.COLUMNS (money adds the currency).
XLSX_FORMATS = {"int": "#,##0", "count": "#,##0", "share": "0.0%", "pct": "+0.0%;-0.0%;0.0%", "prob": "0%",
                "logodds": "+0.000;-0.000;0.000", "spreads": "0.0", "evalue": "0.00",
                "ratio": '0.00"x"', "money": "#,##0.00", "text": "@"}


def _definitions(level: float, currency: str) -> pd.DataFrame:
    """The definitions sheet: each column of the results, its unit and meaning."""
    from liftpool.models.estimands import PROBABILITIES, QUANTITIES
    from liftpool.models.sensitivity import TIP_MEANINGS

    rows = []
    for key, (_, kind) in COLUMNS.items():
        base = key
        for suffix in ("_lower50", "_upper50", "_lower", "_upper"):
            if key.endswith(suffix):
                base = key[: -len(suffix)]
        meaning = (QUANTITIES.get(base, (None, ""))[1] or PROBABILITIES.get(base, (None, None, ""))[2]
                   or TIP_MEANINGS.get(key, ""))
        if key.endswith(("_lower50", "_upper50")):
            meaning = f"{'lower' if 'lower' in key else 'upper'} end of the 50% credible interval"
        elif key.endswith(("_lower", "_upper")):
            meaning = (f"{'lower' if key.endswith('_lower') else 'upper'} end of the {int(round(level * 100))}% "
                       "equal-tailed credible interval")
        extra = {"campaign": "campaign name (pooled rows: all campaigns, a new campaign)",
                 "row": "campaign, all campaigns (the portfolio) or a new campaign (predictive)",
                 "users_seen": "users who saw at least one ad", "users_unseen": "users served only non-viewable ads",
                 "nonviewable_share": "share of measured impressions that were not viewable",
                 "notes": "why a value is missing or not bounded"}.get(key)
        rows.append({"column": label(key, level, currency), "key (CSV header)": key, "unit": kind,
                     "meaning": extra or meaning or ""})
    rows.append({"column": "(empty cell)", "key (CSV header)": "", "unit": "",
                 "meaning": "not bounded (e.g. a cost when the incremental conversions may be zero or below) or "
                            "not available; the notes column says which"})
    return pd.DataFrame(rows)


def _cell_value(v):
    if v is pd.NA or v is None:
        return None
    if isinstance(v, (float, np.floating)) and not np.isfinite(v):
        return None  # never inf or NaN in a finance workbook: an empty cell, explained in the notes
    if isinstance(v, np.generic):
        return v.item()
    return v


def write_xlsx(tables: dict[str, pd.DataFrame], path: Path, level: float = 0.9, currency: str = "USD") -> None:
    """One sheet per table, numbers in natural units with Excel number formats, a frozen header, a sheet
    of definitions; text cells are always text (never formulas)."""
    from openpyxl import Workbook
    from openpyxl.styles import Font

    wb = Workbook()
    wb.remove(wb.active)
    sheets = dict(tables)
    if "campaign_results" in sheets:
        sheets["definitions"] = _definitions(level, currency)
    for name, df in sheets.items():
        ws = wb.create_sheet(name[:31])
        keyed = name == "campaign_results"
        heads = [label(c, level, currency) if keyed and c in COLUMNS else str(c) for c in df.columns]
        for j, h in enumerate(heads, start=1):
            cell = ws.cell(row=1, column=j, value=h)
            cell.data_type = "s"
            cell.font = Font(bold=True)
        for i, row in enumerate(df.itertuples(index=False), start=2):
            for j, (col, v) in enumerate(zip(df.columns, row, strict=True), start=1):
                v = _cell_value(v)
                cell = ws.cell(row=i, column=j, value=v)
                if isinstance(v, str):
                    cell.data_type = "s"  # a name starting with "=" stays text
                kind = COLUMNS.get(col, (None, None))[1] if keyed else None
                if kind and kind != "text" and v is not None:
                    cell.number_format = (f'"{currency_symbol(currency)}"' + XLSX_FORMATS[kind] if kind == "money"
                                          else XLSX_FORMATS[kind])
                elif isinstance(v, float):
                    cell.number_format = "#,##0.0000"
        ws.freeze_panes = "B2"
        for j, h in enumerate(heads, start=1):
            width = max([len(h)] + [len(str(_cell_value(x) or "")) for x in df.iloc[:, j - 1].head(200)])
            ws.column_dimensions[ws.cell(row=1, column=j).column_letter].width = min(60, max(10, width + 2))
    wb.save(path)


def _check_prep_summary(prep: PrepSummary, campaigns: list[str]) -> None:
    """The prep summary must be one, and of these counts: every fitted campaign in it."""
    c = prep.campaigns
    need = ("campaign", "nonviewable_share")
    if c.empty or any(k not in c.columns for k in need):
        raise InputError(problem="not a prep summary: it has no per-campaign table with campaign and "
                                 "nonviewable_share", file="--prep-summary",
                         fix="give the <name>.summary.json that 'liftpool prepare' wrote beside the counts")
    missing = sorted(set(campaigns) - set(c["campaign"].astype(str)))
    if missing:
        shown = ", ".join(repr(m) for m in missing[:5]) + (" ..." if len(missing) > 5 else "")
        raise InputError(problem=f"the prep summary is of other data: {len(missing)} fitted campaign(s) are not in "
                                 f"it ({shown})", file="--prep-summary",
                         fix="give the summary written with the counts this fit used")


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
    if prep_summary is not None:
        _check_prep_summary(prep_summary, camps)
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
                       fit.converged, fit.mode, flags, title, totals, screen=screen_tables,
                       prep_warnings=tuple(prep_summary.warnings) if prep_summary is not None else ())
    with atomic_folder(out) as tmp:
        (tmp / "report.html").write_text(html, encoding="utf-8")
        named = tables.named()
        if screen_tables is not None:
            _, named["screen_ranking"], named["screen_balance"] = screen_tables
        write_xlsx(named, tmp / "tables.xlsx", level=tables.level, currency=tables.currency)
        for name, df in named.items():
            spreadsheet_safe(df).to_csv(tmp / f"{name}.csv", index=False)
        (tmp / "figures").mkdir()
        for name, png in figures.items():
            (tmp / "figures" / name).write_bytes(png)
    return out
