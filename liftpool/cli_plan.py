"""``liftpool plan``: how precise will a campaign's lift be, and what would sharpen it?"""

from __future__ import annotations

from pathlib import Path

__all__ = ["register", "cmd_plan"]

#: PlanInputs fields that have a command-line flag of the same name
FIELDS = ("users", "seen_share", "baseline_rate", "lift", "placebos", "campaigns", "level", "placebo_rate",
          "bias_mean", "bias_sd", "residual_sd", "lift_sd", "excess_sd", "test_se")


def register(sub, common) -> None:
    p = sub.add_parser(
        "plan", help="expected interval width, chance to exclude zero, users needed",
        description="Plan a campaign: the expected width of its bias-corrected lift interval, the chance the "
                    "interval excludes zero, and the users needed for a target width or chance. Give the "
                    "inputs, or a workspace whose fit supplies the bias spread and pooling (docs/planning.md).")
    p.add_argument("workspace", nargs="?", metavar="WS", help="a workspace: reuse a fit's bias spread and pooling")
    p.add_argument("--fit", help="with WS: the fit id to reuse (default the newest)")
    p.add_argument("--campaign", help="with WS: take users, seen share and rate from this campaign")
    g = p.add_argument_group("campaign (defaults: 100000 users, 0.5 seen, 1%% rate, +10%% lift)")
    g.add_argument("--users", type=float, help="exposed users (seen + unseen)")
    g.add_argument("--seen-share", type=float, help="share of exposed users who saw a viewable impression")
    g.add_argument("--baseline-rate", type=float, help="target conversion rate among unseen users, e.g. 0.01")
    g.add_argument("--lift", type=float, help="expected relative lift among seen users, e.g. 0.1 for +10%%")
    g.add_argument("--placebos", type=int, help="placebo outcomes per campaign (default 4)")
    g.add_argument("--campaigns", type=int, help="campaigns pooled, this one included (default 1)")
    g.add_argument("--level", type=float, help="credible-interval level (default 0.9)")
    g = p.add_argument_group("bias and pooling, log odds (defaults are assumptions: plan from a fit to measure them)")
    g.add_argument("--placebo-rate", type=float, help="a placebo outcome's rate among unseen users (default: the target's)")
    g.add_argument("--bias-mean", type=float, help="mean campaign bias (default 0)")
    g.add_argument("--bias-sd", type=float, help="spread of the campaign bias across campaigns (default 0.1)")
    g.add_argument("--residual-sd", type=float, help="spread of one outcome's own bias (default 0.05)")
    g.add_argument("--lift-sd", type=float, help="spread of true lifts across campaigns (default 0.1)")
    g.add_argument("--no-bias", action="store_true", help="switch the bias terms off (randomized-test arithmetic)")
    g.add_argument("--excess-sd", type=float,
                   help="spread across campaigns of the target's bias beyond its placebos' (default 0.05)")
    g.add_argument("--test-se", type=float,
                   help="standard error of one randomized test's lift, log scale (default 0.05, about +-5%%)")
    g = p.add_argument_group("questions")
    g.add_argument("--target-width", type=float, help="solve the users for this width (relative-lift points, 0.05 = 5)")
    g.add_argument("--power", type=float, help="solve the users for this chance that the interval excludes zero")
    g.add_argument("--excess-width", type=float,
                   help="solve the randomized tests needed for this interval width of the target's excess bias "
                        "(log odds, e.g. 0.1)")
    g.add_argument("--simulate", type=int, metavar="N",
                   help="cross-check by N simulated data sets fitted with the quick mode")
    g.add_argument("--out", help="new folder for plan.json, width_curve.csv and width_vs_users.png")
    g.add_argument("--seed", type=int, default=0, help="simulation seed (default 0)")
    common(p)
    p.set_defaults(func=cmd_plan)


def cmd_plan(args, console) -> int:
    from liftpool.data_prep.errors import InputError
    from liftpool.models.planning import PlanInputs, plan, plan_inputs_from_fit, simulate_plan

    given = {name: getattr(args, name) for name in FIELDS if getattr(args, name) is not None}
    if args.no_bias:
        given["bias"] = False
    if args.out and Path(args.out).exists() and any(Path(args.out).iterdir()):
        raise InputError(problem="the output folder exists and is not empty", file=args.out,
                         fix="give a new folder for --out (plans are never written over)")
    if args.workspace:
        from liftpool.workspace import Workspace

        ws = Workspace.open(args.workspace)
        fid = ws.resolve_fit(args.fit)
        console.step(f"reusing fit {fid}: bias spread and pooling from its posterior")
        inp = plan_inputs_from_fit(ws.load_fit(fid), campaign=args.campaign, **given)
    else:
        if args.fit or args.campaign:
            raise InputError(problem="--fit and --campaign need a workspace",
                             fix="give the workspace first: liftpool plan WS --fit ID")
        inp = PlanInputs.from_mapping(given)
    p = plan(inp, target_width=args.target_width, power=args.power, excess_target_width=args.excess_width)
    console.out(p.render())
    sim = None
    if args.simulate:
        console.step(f"simulating {args.simulate} data sets through the quick mode")
        sim = simulate_plan(inp, n_sims=args.simulate, seed=args.seed)
        console.out(f"simulation ({sim['n_sims']} data sets, quick mode): mean width "
                    f"{100 * sim['mean_width']:.1f} points (+/- {100 * sim['width_mcse']:.1f}), excludes zero in "
                    f"{100 * sim['excludes_zero']:.0f}%, covers the true lift in {100 * sim['coverage']:.0f}%")
    if args.out:
        from liftpool.reports.planning import write_plan

        out = write_plan(p, args.out, simulation=sim)
        console.out(f"plan written to {out} (plan.json, width_curve.csv, width_vs_users.png)")
    return 0
