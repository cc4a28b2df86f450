"""``liftpool report``: a fit folder to a report folder."""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["register"]


def register(sub, common) -> None:
    p = sub.add_parser("report", help="posterior to a finance-ready report (HTML, XLSX, CSV, PNG)",
                       description="Write report.html (self-contained), tables.xlsx, one CSV per table and the "
                                   "figures for a fit.")
    p.add_argument("workspace", nargs="?", metavar="WS", help="a workspace: report one of its fits into WS/reports/<id>")
    p.add_argument("--fit", help="fit folder written by 'liftpool fit' (with WS: a fit id; default the newest)")
    p.add_argument("--out", help="new folder for the report (never written over)")
    p.add_argument("--spend", help="CSV or Parquet: campaign, spend, value_per_conversion")
    p.add_argument("--prep-summary", help="the <counts>.summary.json written by 'liftpool prepare'")
    p.add_argument("--currency", default="USD", help="ISO currency code of spend and values (default USD)")
    p.add_argument("--level", type=float, help="interval level (default: the fit's, 0.9)")
    p.add_argument("--title", default="Display advertising lift report", help="report title")
    common(p)
    p.set_defaults(func=cmd_report)


def cmd_report(args, console) -> int:
    from liftpool.data_prep.counts import PrepSummary
    from liftpool.data_prep.errors import InputError
    from liftpool.reports import read_spend, write_report

    if args.workspace:
        from liftpool.workspace import Workspace

        ws = Workspace.open(args.workspace)
        with ws.lock("report"):
            out = ws.report(args.fit, progress=console.step)
        console.out(f"report written to {out}")
        console.out(f"open {out / 'report.html'}")
        return 0
    if not args.fit or not args.out:
        raise InputError(problem="missing --fit or --out", fix="give a workspace (liftpool report WS) or --fit and --out")
    spend = read_spend(args.spend) if args.spend else None
    prep = None
    if args.prep_summary:
        p = Path(args.prep_summary)
        if not p.is_file():
            raise InputError(problem="file not found", file=str(p), fix="give the .summary.json written by prepare")
        try:
            prep = PrepSummary.from_dict(json.loads(p.read_text()))
        except (json.JSONDecodeError, AttributeError) as exc:
            raise InputError(problem=f"not a prep summary: {exc}", file=str(p),
                             fix="give the .summary.json written by 'liftpool prepare'") from None
    if args.level is not None and not 0 < args.level < 1:
        raise InputError(problem=f"--level must be between 0 and 1, got {args.level}", fix="use e.g. --level 0.9")
    console.step("building tables and figures")
    out = write_report(args.fit, args.out, spend=spend, prep_summary=prep, currency=args.currency, level=args.level,
                       title=args.title)
    console.out(f"report written to {out}")
    console.out(f"open {out / 'report.html'}")
    return 0
