"""The ``liftpool`` command line: a thin shell over the three layers.

Exit codes: 0 ok, 1 internal error, 2 bad input, 3 fit not converged
(with ``--strict``), 130 interrupted.
"""

from __future__ import annotations

import argparse
import errno
import os
import sys
import traceback
from pathlib import Path

from liftpool import __version__
from liftpool.console import Console

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_NOT_CONVERGED, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("output")
    g.add_argument("--quiet", "-q", action="store_true", help="print only results and errors")
    g.add_argument("--verbose", "-v", action="store_true", help="print more detail (and tracebacks)")


def _rules_args(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("counting rules (defaults in docs/counting-rules.md)")
    g.add_argument("--covariates", help="comma-separated cell covariates: users-table columns and/or the "
                   "built-ins frequency, view_history (default: frequency,view_history; 'none' for no cells)")
    g.add_argument("--window-days", type=float, help="attribution window in days (default 14)")
    g.add_argument("--min-cell-users", type=int, help="users needed in each arm of a cell (default 20)")
    g.add_argument("--small-cells", choices=["merge", "drop"], help="what to do with small cells (default merge)")
    g.add_argument("--with-unexposed", action="store_true",
                   help="add an unexposed arm from users never served the campaign (the users table must "
                        "cover the whole population); enables the naive comparison")


def _rules_from_args(args) -> dict:
    out: dict = {}
    if args.covariates is not None:
        text = args.covariates.strip()
        out["covariates"] = () if text.lower() in ("", "none") else tuple(c.strip() for c in text.split(",") if c.strip())
    if args.window_days is not None:
        out["window_days"] = args.window_days
    if args.min_cell_users is not None:
        out["min_cell_users"] = args.min_cell_users
    if args.small_cells is not None:
        out["small_cells"] = args.small_cells
    if args.with_unexposed:
        out["unexposed"] = True
    return out


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="liftpool",
        description="Bias-corrected, partially pooled lift of display campaigns from seen/unseen log data "
                    "and placebo (negative-control) outcomes.",
    )
    parser.add_argument("--version", action="version", version=f"liftpool {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("prepare", help="logs to seen/unseen counts by campaign, cell and outcome",
                       description="Turn impression and conversion logs into a counts table and print the "
                                   "data-preparation summary.")
    p.add_argument("workspace", nargs="?", metavar="WS", help="a workspace (then its liftpool.toml gives the inputs)")
    p.add_argument("--impressions", help="impressions file (.csv or .parquet)")
    p.add_argument("--conversions", help="conversions file")
    p.add_argument("--outcomes", help="outcomes file: campaign, outcome, role (target|placebo)")
    p.add_argument("--users", help="optional users file: user_id plus covariate columns")
    p.add_argument("--spend", help="optional spend file: campaign, spend, value_per_conversion (checked here)")
    p.add_argument("--out", help="counts file to write (.parquet or .csv); the summary is "
                   "written beside it as <name>.summary.json")
    from liftpool.data_prep.prepare import ENGINES

    p.add_argument("--engine", default=ENGINES[0], choices=ENGINES,
                   help="counting engine (default duckdb: out of core; spark: the same SQL on Apache Spark, "
                        "needs liftpool[spark], docs/spark.md)")
    p.add_argument("--spark-master", help="Spark master for --engine spark, e.g. local[4] (default: the one "
                   "spark-submit gives, else local)")
    _rules_args(p)
    _common(p)
    p.set_defaults(func=_cmd_prepare)

    p = sub.add_parser("simulate", help="write the invented demo scenario's input files",
                       description="Simulate Fernhollow Home & Garden, an invented retailer, and write its "
                                   "logs plus truth.csv (the true lift of each campaign).")
    p.add_argument("--out", required=True, help="folder to write")
    p.add_argument("--seed", type=int, default=20261201)
    p.add_argument("--scale", type=float, default=1.0, help="multiply users and reach (default 1)")
    p.add_argument("--format", choices=["parquet", "csv"], default="parquet", help="log file format")
    p.add_argument("--zero-lift", action="store_true", help="every campaign's true lift is zero")
    _common(p)
    p.set_defaults(func=_cmd_simulate)

    p = sub.add_parser("demo", help="the whole pipeline on the invented scenario",
                       description="Simulate the invented scenario into a fresh folder and run the pipeline on it.")
    p.add_argument("workspace", nargs="?", default="demo-workspace", help="folder to create (default demo-workspace)")
    p.add_argument("--seed", type=int, default=20261201)
    _common(p)
    p.set_defaults(func=_cmd_demo)

    _register_later(sub)
    return parser


def _register_later(sub) -> None:
    """Commands of the model and report layers."""
    from liftpool import cli_fit, cli_plan, cli_report, cli_screen, cli_ws

    cli_fit.register(sub, _common)
    cli_report.register(sub, _common)
    cli_plan.register(sub, _common)
    cli_screen.register(sub, _common, _rules_args, _rules_from_args)
    cli_ws.register(sub, _common, _rules_args, _rules_from_args)


def _cmd_prepare(args, console: Console) -> int:
    from liftpool.data_prep import CountingRules, prepare_counts
    from liftpool.data_prep.io import atomic_path, write_json, write_table

    if args.workspace:
        return _prepare_workspace(args, console)
    from liftpool.data_prep.errors import InputError

    missing = [f"--{k}" for k in ("impressions", "conversions", "outcomes", "out") if not getattr(args, k)]
    if missing:
        raise InputError(problem=f"missing {', '.join(missing)}",
                         fix="give a workspace (liftpool prepare WS) or the files and --out")
    out = Path(args.out)
    # checked before any work: the table formats liftpool writes, and not a folder
    if not out.name.lower().endswith((".parquet", ".pq", ".csv")):
        raise InputError(problem="the counts file must end in .parquet or .csv (compressed CSV is not written)",
                         file=str(out), fix="give --out counts.parquet (recommended) or --out counts.csv")
    if out.is_dir():
        raise InputError(problem="--out is a folder", file=str(out), fix="give a file name such as counts.parquet")
    rules = CountingRules(**_rules_from_args(args))
    spark = None
    if args.engine == "spark":
        from liftpool.data_prep.engine_spark import spark_session

        console.step("starting Spark" + (f" ({args.spark_master})" if args.spark_master else ""))
        spark = spark_session(args.spark_master)
    res = prepare_counts(args.impressions, args.conversions, args.outcomes, users=args.users, spend=args.spend,
                         rules=rules, engine=args.engine, progress=console.step, spark=spark)
    res.summary.totals["input_sha256"] = input_hashes(args)
    # the summary is named after its own counts file (counts.v1.parquet -> counts.v1.summary.json), and
    # both are written in full before either replaces an earlier one: a full disk leaves the old pair
    summary_path = out.with_name(out.name[: -len(out.suffix)] + ".summary.json")
    with atomic_path(summary_path) as tmp_summary, atomic_path(out) as tmp_counts:
        write_json(res.summary.to_dict(), tmp_summary)
        write_table(res.counts, tmp_counts.with_name(tmp_counts.name + out.suffix))
        os.replace(tmp_counts.with_name(tmp_counts.name + out.suffix), tmp_counts)
    console.out(res.summary.render())
    console.out()
    console.out(f"counts: {out} ({len(res.counts):,} rows)")
    console.out(f"summary: {summary_path}")
    return EXIT_OK


def _prepare_workspace(args, console: Console) -> int:
    from liftpool.data_prep.errors import InputError
    from liftpool.workspace import Workspace

    given = [f"--{k.replace('_', '-')}" for k in ("impressions", "conversions", "outcomes", "users", "spend", "out",
                                                  "covariates", "window_days", "min_cell_users", "small_cells")
             if getattr(args, k, None)]
    if given:
        raise InputError(problem=f"{', '.join(given)} cannot be used with a workspace",
                         file=str(Path(args.workspace) / "liftpool.toml"),
                         fix="set inputs and counting rules in the workspace's liftpool.toml")
    ws = Workspace.open(args.workspace)
    with ws.lock("prepare"):
        summary = ws.prepare(progress=console.step)
    console.out(summary.render())
    console.out(f"\ncounts: {ws.current() / 'counts.parquet'}")
    return EXIT_OK


def input_hashes(args) -> dict:
    from liftpool.data_prep.io import input_sha256

    return input_sha256({k: getattr(args, k, None) for k in ("impressions", "conversions", "outcomes", "users",
                                                              "spend")})


def _cmd_simulate(args, console: Console) -> int:
    from liftpool.data_prep import write_scenario

    console.step(f"simulating the invented scenario (seed {args.seed}, scale {args.scale:g})")
    paths = write_scenario(args.out, seed=args.seed, scale=args.scale, fmt=args.format, zero_lift=args.zero_lift)
    for kind, path in paths.items():
        console.out(f"{kind}: {path}")
    return EXIT_OK


def _cmd_demo(args, console: Console) -> int:
    from liftpool.demo import run_demo

    return run_demo(Path(args.workspace), seed=args.seed, console=console)


_INTERRUPT_MESSAGE = "interrupted: nothing was changed by the unfinished step"
#: Set once Ctrl-C or SIGTERM arrives: whatever error follows is the interruption's (DuckDB turns the
#: KeyboardInterrupt raised inside its query into an InterruptException of its own).
_INTERRUPTED = {"hit": False}


def _install_interrupt_watchdog(grace_seconds: float = 10.0) -> None:
    """Ctrl-C ends the command: politely first (KeyboardInterrupt), for sure after a grace period.

    Libraries sometimes catch KeyboardInterrupt and carry on (a compile step, a sampler).
    Every write liftpool makes is atomic, so ending the process is always safe.
    """
    import os
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return
    state = _INTERRUPTED
    state["hit"] = False

    def hard_exit() -> None:
        sys.stderr.write(_INTERRUPT_MESSAGE + "\n")
        sys.stderr.flush()
        os._exit(EXIT_INTERRUPTED)

    def handler(signum, frame):
        if state["hit"]:
            hard_exit()
        state["hit"] = True
        timer = threading.Timer(grace_seconds, hard_exit)
        timer.daemon = True
        timer.start()
        sources = sys.modules.get("liftpool.data_prep.sources")
        if sources is not None:  # a DuckDB query stops only when told to
            sources.interrupt_queries()
        raise KeyboardInterrupt

    signal.signal(signal.SIGINT, handler)
    # a scheduler's or `kill`'s SIGTERM ends the command the same way: the sampler's worker processes
    # are stopped and nothing is half-written (a SIGKILL cannot be caught: the workspace lock recovers)
    signal.signal(signal.SIGTERM, handler)


def main(argv: list[str] | None = None) -> int:
    _install_interrupt_watchdog()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_OK
    console = Console(quiet=getattr(args, "quiet", False), verbose=getattr(args, "verbose", False))
    from liftpool.data_prep.errors import LiftpoolError

    try:
        return int(args.func(args, console) or 0)
    except LiftpoolError as exc:
        print(f"error: {exc}", file=sys.stderr)
        if console.verbose:
            traceback.print_exc()
        return exc.exit_code
    except KeyboardInterrupt:
        print(_INTERRUPT_MESSAGE, file=sys.stderr)
        return EXIT_INTERRUPTED
    except OSError as exc:
        if exc.errno not in _DISK_ERRORS or _INTERRUPTED["hit"]:
            return _last_resort(exc, console)
        # a disk that filled up or turned read-only while writing (every write is staged, so nothing
        # half-written is left in place)
        print(f"error: cannot write {exc.filename or 'the output'}: {exc.strerror}\n"
              "  fix: free some space on that disk or choose an output place you can write to; then run the "
              "command again", file=sys.stderr)
        return EXIT_INPUT
    except Exception as exc:  # noqa: BLE001 - last resort
        return _last_resort(exc, console)


#: errno values of a full, read-only or forbidden output place.
_DISK_ERRORS = {errno.ENOSPC, errno.EROFS, errno.EACCES, errno.EDQUOT, errno.EPERM}


def _last_resort(exc: BaseException, console) -> int:
    """An error nobody foresaw: a bug, unless it follows an interruption."""
    if _INTERRUPTED["hit"] or type(exc).__name__ == "InterruptException":
        print(_INTERRUPT_MESSAGE, file=sys.stderr)
        return EXIT_INTERRUPTED
    print(f"internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
    print("this is a bug in liftpool; run again with --verbose for the traceback and report it",
          file=sys.stderr)
    if console.verbose:
        traceback.print_exc()
    return EXIT_INTERNAL
