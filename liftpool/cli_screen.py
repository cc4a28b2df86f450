"""``liftpool screen``: which covariates should define the cells?"""

from __future__ import annotations

from pathlib import Path

__all__ = ["register", "cmd_screen"]


def register(sub, common, rules_args, rules_from_args) -> None:
    p = sub.add_parser(
        "screen", help="rank candidate cell covariates by the placebo bias they remove",
        description="For every candidate covariate (each users column and the built-ins frequency and "
                    "view_history): its balance between seen and unseen users, its association with the "
                    "placebo outcomes, the placebo bias with and without cells on it, and a greedy "
                    "forward-selection suggestion. The counting rules are not changed.")
    p.add_argument("workspace", nargs="?", metavar="WS", help="a workspace: screen its inputs into WS/screens/NNN")
    p.add_argument("--impressions", help="impressions file (.csv or .parquet)")
    p.add_argument("--conversions", help="conversions file")
    p.add_argument("--outcomes", help="outcomes file: campaign, outcome, role (target|placebo)")
    p.add_argument("--users", help="users file: user_id plus candidate covariate columns")
    p.add_argument("--candidates", help="comma-separated candidates (default: every users column, frequency, "
                                        "view_history)")
    p.add_argument("--out", help="new folder for screen.json, the CSV tables and balance.png")
    rules_args(p)
    common(p)
    p.set_defaults(func=cmd_screen, _rules_from_args=rules_from_args)


def cmd_screen(args, console) -> int:
    from liftpool.data_prep import CountingRules
    from liftpool.data_prep.errors import InputError

    cands = None
    if args.candidates:
        cands = [c.strip() for c in args.candidates.split(",") if c.strip()]
    if args.out and Path(args.out).exists() and any(Path(args.out).iterdir()):
        raise InputError(problem="the output folder exists and is not empty", file=args.out,
                         fix="give a new folder for --out (screens are never written over)")
    if args.workspace:
        from liftpool.screen import load_screen
        from liftpool.workspace import Workspace

        ws = Workspace.open(args.workspace)
        with ws.lock("screen"):
            out = ws.screen(candidates=cands, progress=console.step)
        console.out(load_screen(out).render())
        console.out(f"screen written to {out}; the next report of this workspace includes it in its appendix")
        return 0
    missing = [f"--{n}" for n in ("impressions", "conversions", "outcomes") if not getattr(args, n)]
    if missing:
        raise InputError(problem=f"missing {', '.join(missing)}",
                         fix="give the input files, or a workspace: liftpool screen WS")
    from liftpool.screen import screen_inputs

    rules = CountingRules.from_mapping(args._rules_from_args(args))
    result = screen_inputs(args.impressions, args.conversions, args.outcomes, users=args.users, rules=rules,
                           candidates=cands, progress=console.step)
    console.out(result.render())
    if args.out:
        out = result.save(args.out)
        console.out(f"screen written to {out} (screen.json, ranking.csv, steps.csv, balance CSVs, balance.png)")
    return 0
