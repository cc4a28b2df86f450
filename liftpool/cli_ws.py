"""Workspace commands: init, check, add-placebo, history, compare (prepare, fit and report take WS too)."""

from __future__ import annotations

from pathlib import Path

__all__ = ["register"]


def register(sub, common, rules_args, rules_from_args) -> None:
    p = sub.add_parser("init", help="create a workspace that remembers inputs, settings, fits and reports",
                       description="Create workspace folder WS with liftpool.toml pointing at the input files.")
    p.add_argument("workspace", metavar="WS")
    p.add_argument("--impressions", required=True)
    p.add_argument("--conversions", required=True, action="append", help="conversions file (repeatable)")
    p.add_argument("--outcomes", required=True, action="append", help="outcomes file (repeatable)")
    p.add_argument("--users")
    p.add_argument("--spend")
    p.add_argument("--experiments", help="randomized tests: campaign, estimate, std_error, measures, exposed_share "
                                         "(docs/data-format.md); every fit of the workspace uses them")
    rules_args(p)
    p.add_argument("--currency", help="ISO currency code for the report (default USD)")
    p.add_argument("--engine", choices=["duckdb", "spark"],
                   help="counting engine of 'prepare WS' (default duckdb; spark needs liftpool[spark])")
    p.add_argument("--spark-master", help="Spark master for --engine spark, e.g. local[2] (default: Spark's own)")
    common(p)
    p.set_defaults(func=cmd_init, _rules=rules_from_args)

    p = sub.add_parser("check", help="validate a workspace's inputs without counting or fitting")
    p.add_argument("workspace", metavar="WS")
    common(p)
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("add-placebo", help="register new placebo outcomes and re-count only them",
                       description="Add placebo outcomes (campaign, outcome, role=placebo) and count only their "
                                   "conversions, from the exposures cached in the workspace.")
    p.add_argument("workspace", metavar="WS")
    p.add_argument("--outcomes", required=True, help="file with the new rows: campaign, outcome, role")
    p.add_argument("--conversions", help="file with the new outcomes' conversions (default: the workspace's)")
    common(p)
    p.set_defaults(func=cmd_add_placebo)

    p = sub.add_parser("history", help="list the workspace's fits")
    p.add_argument("workspace", metavar="WS")
    common(p)
    p.set_defaults(func=cmd_history)

    p = sub.add_parser("compare", help="how the bias and each campaign's interval moved between two fits")
    p.add_argument("workspace", metavar="WS")
    p.add_argument("a", metavar="A", help="fit id (or its number)")
    p.add_argument("b", metavar="B", help="fit id (or its number)")
    common(p)
    p.set_defaults(func=cmd_compare)


def cmd_init(args, console) -> int:
    from liftpool.workspace import Workspace

    counting = args._rules(args)
    ws = Workspace.init(args.workspace, args.impressions, args.conversions, args.outcomes, users=args.users,
                        spend=args.spend, experiments=args.experiments, counting=counting,
                        report={"currency": args.currency} if args.currency else None,
                        prepare={k: v for k, v in (("engine", args.engine), ("spark_master", args.spark_master))
                                 if v} or None)
    console.out(f"workspace created: {ws.path} (settings in {ws.path / 'liftpool.toml'})")
    console.out(f"next: liftpool check {ws.path}; liftpool prepare {ws.path}; liftpool fit {ws.path}")
    return 0


def cmd_check(args, console) -> int:
    from liftpool.workspace import Workspace

    ws = Workspace.open(args.workspace)
    # no lock: check only reads, and every file a command writes is switched in whole (a rename)
    rows, warnings = ws.check(progress=console.step)
    for k, n in rows.items():
        console.out(f"{k}: {n:,} rows, valid")
    for w in warnings:
        console.out(f"WARNING: {w}")
    console.out("all inputs are valid" + (f", with {len(warnings)} warning(s) above" if warnings else ""))
    return 0


def cmd_add_placebo(args, console) -> int:
    from liftpool.workspace import Workspace

    ws = Workspace.open(args.workspace)
    with ws.lock("add-placebo"):
        summary, rows = ws.add_placebo(args.outcomes, args.conversions, progress=console.step)
    console.out(summary.render())
    console.out(f"\nread {rows:,} conversion rows of the new outcomes; counts updated in {ws.current()}")
    console.out(f"next: liftpool fit {ws.path}")
    return 0


def cmd_history(args, console) -> int:
    from liftpool.workspace import Workspace

    ws = Workspace.open(args.workspace)
    h = ws.history()
    if h.empty:
        console.out("no fits yet")
        return 0
    show = h.copy()
    show["portfolio lift (median)"] = show["portfolio lift (median)"].map(lambda v: "n/a" if v != v else f"{v:+.1%}")
    show["median bias (log odds)"] = show["median bias (log odds)"].map(lambda v: "n/a" if v != v else f"{v:.3f}")
    console.out(show.to_string(index=False))
    return 0


def cmd_compare(args, console) -> int:
    from liftpool.data_prep.io import atomic_folder, spreadsheet_safe, write_table
    from liftpool.reports.compare import CHANGE_LIFT, CHANGE_WIDTH
    from liftpool.reports.money import fmt_pct, fmt_pp
    from liftpool.workspace import Workspace

    ws = Workspace.open(args.workspace)
    a, b = ws.resolve_fit(args.a), ws.resolve_fit(args.b)
    table, png = ws.compare(a, b)
    for w in table.attrs.get("warnings", []):
        console.out(f"WARNING: {w}")
    # a new folder each time, written whole or not at all (never over an earlier comparison)
    base = ws.path / "reports" / f"compare-{a}-vs-{b}"
    out, n = base, 2
    while out.exists():
        out = base.with_name(f"{base.name}.{n}")
        n += 1
    with atomic_folder(out) as tmp:
        write_table(spreadsheet_safe(table), tmp / "compare.csv")
        (tmp / "compare.png").write_bytes(png)
    cols = ["campaign", f"lift median ({a})", f"lift median ({b})", CHANGE_LIFT, CHANGE_WIDTH,
            f"bias median, log odds ({a})", f"bias median, log odds ({b})"]
    fmt = table[[c for c in cols if c in table.columns]].copy()
    for c in fmt.columns[1:]:
        # lifts in percent; their changes in percentage points (a difference of percentages)
        kind = "pp" if c in (CHANGE_LIFT, CHANGE_WIDTH) else "pct" if "lift" in c else "num"
        fmt[c] = fmt[c].map(lambda v, kind=kind: "" if v != v else fmt_pp(v) if kind == "pp"
                            else fmt_pct(v) if kind == "pct" else f"{v:.3f}")
    console.out(fmt.to_string(index=False))
    console.out(f"\ntable and figure: {Path(out)}")
    return 0
