"""``liftpool fit``: counts file to a fit folder (posterior.nc, estimands.nc, summary.csv, fit.json)."""

from __future__ import annotations

import argparse
from pathlib import Path

__all__ = ["register", "settings_from_args", "overrides_from_args", "model_args"]


def model_args(p: argparse.ArgumentParser) -> None:
    """The model options; their choices and defaults come from :mod:`liftpool.models.settings` (one place)."""
    from liftpool.models.settings import (
        BIAS_SIGNS,
        DEFAULT_ACCEPT,
        EXCESS_MODES,
        INITS,
        LIKELIHOODS,
        PARAMETERIZATIONS,
        SAMPLERS,
        SMALL_PORTFOLIO,
        SMALL_PORTFOLIO_ACCEPT,
        ModelSettings,
    )

    d = ModelSettings()
    g = p.add_argument_group("model and sampler (defaults in docs/model.md)")
    g.add_argument("--quick", action="store_true", help="quick mode: stratified estimates pooled exactly, seconds")
    g.add_argument("--chains", type=int, help=f"NUTS chains (default {d.chains})")
    g.add_argument("--draws", type=int, help=f"kept draws per chain (default {d.draws})")
    g.add_argument("--tune", type=int, help=f"tuning steps per chain (default {d.tune})")
    g.add_argument("--seed", type=int, help=f"random seed (default {d.seed}; recorded with the fit)")
    g.add_argument("--level", type=float, help=f"credible-interval level (default {d.level:g})")
    g.add_argument("--sampler", choices=SAMPLERS, help=f"NUTS implementation (default {d.sampler})")
    g.add_argument("--likelihood", choices=LIKELIHOODS,
                   help=f"default {d.likelihood}: cell baselines conditioned away, campaign effects integrated; "
                        "binomial: the earlier reference model, every cell baseline sampled (docs/model.md)")
    g.add_argument("--init", choices=INITS, help=f"how PyMC's NUTS starts (default {d.init})")
    g.add_argument("--target-accept", type=float,
                   help=f"NUTS target acceptance (default {DEFAULT_ACCEPT['conditional']:g}, "
                        f"{SMALL_PORTFOLIO_ACCEPT:g} for at most {SMALL_PORTFOLIO} campaigns; "
                        f"{DEFAULT_ACCEPT['binomial']:g} for --likelihood binomial)")
    g.add_argument("--parameterization", choices=PARAMETERIZATIONS,
                   help="of sampled campaign-level effects (binomial model, or --bias-sign nonnegative; "
                        f"default {d.parameterization})")
    g.add_argument("--bias-sign", choices=BIAS_SIGNS,
                   help=f"nonnegative: constrain each campaign's bias to >= 0 (default {d.bias_sign})")
    g.add_argument("--outcome-bias", action="store_true", help="add a bias effect per outcome shared by campaigns")
    g.add_argument("--groups", help="CSV with campaign,group (e.g. product line): a further pooling level")
    g.add_argument("--experiments", metavar="F",
                   help="randomized tests (campaign, estimate, std_error, measures, exposed_share): each pins its "
                        "campaign's lift and calibrates the target's excess bias (docs/model.md); a workspace's "
                        "own inputs.experiments by default")
    g.add_argument("--excess-bias", choices=EXCESS_MODES,
                   help=f"the target's bias beyond its placebos' (default {d.excess_bias}: learned when tests are given)")
    g.add_argument("--strict", action="store_true", help="exit with code 3 when the fit did not converge")


def overrides_from_args(args) -> dict:
    """Model settings given on the command line (only those given)."""
    vals = {name: getattr(args, name) for name in ("chains", "draws", "tune", "seed", "level", "sampler",
                                                  "target_accept", "init", "parameterization", "bias_sign",
                                                  "likelihood", "excess_bias")
            if getattr(args, name, None) is not None}
    if getattr(args, "outcome_bias", False):
        vals["outcome_bias"] = True
    return vals


def settings_from_args(args, base: dict | None = None):
    from liftpool.models import ModelSettings

    return ModelSettings.from_mapping({**(base or {}), **overrides_from_args(args)})


def read_groups(path: str | None) -> dict[str, str] | None:
    if not path:
        return None
    import pandas as pd

    from liftpool.data_prep.errors import InputError

    p = Path(path)
    if not p.is_file():
        raise InputError(problem="file not found", file=str(p), fix="check the path of the groups file")
    df = pd.read_csv(p, dtype=str, keep_default_na=False)
    for col in ("campaign", "group"):
        if col not in df.columns:
            raise InputError(problem=f"required column is missing (the file has: {', '.join(df.columns)})",
                             file=str(p), column=col, fix="give a CSV with columns campaign,group")
    return dict(zip(df["campaign"], df["group"], strict=True))


def register(sub, common) -> None:
    p = sub.add_parser("fit", help="counts to posterior: the hierarchical lift model",
                       description="Fit the bias-corrected, partially pooled lift model to a counts file and write "
                                   "DIR/posterior.nc, DIR/estimands.nc, DIR/summary.csv and DIR/fit.json.")
    p.add_argument("workspace", nargs="?", metavar="WS", help="a workspace: fit its current counts into WS/fits/<id>")
    p.add_argument("--counts", help="counts file (.parquet or .csv) from 'liftpool prepare'")
    p.add_argument("--out", help="new folder for the fit (never written over)")
    model_args(p)
    common(p)
    p.set_defaults(func=cmd_fit)


def cmd_fit(args, console) -> int:
    from liftpool.data_prep import read_counts
    from liftpool.data_prep.errors import InputError
    from liftpool.data_prep.io import ensure_room
    from liftpool.models import fit_counts

    if args.workspace:
        return _fit_workspace(args, console)
    if not args.counts or not args.out:
        raise InputError(problem="missing --counts or --out", fix="give a workspace (liftpool fit WS) or --counts and --out")
    out = Path(args.out)
    ensure_room(out)  # a read-only or full disk is said before the fit, not after it
    if out.exists() and any(out.iterdir()):
        raise InputError(problem="the folder already holds files; a fit is never written over another",
                         file=str(out), fix="choose a new --out folder")
    counts = read_counts(args.counts)
    settings = settings_from_args(args)
    tests = None
    if args.experiments:
        from liftpool.data_prep.experiments import read_experiments

        tests = read_experiments(args.experiments, campaigns=sorted(counts["campaign"].astype(str).unique()))
    fit = fit_counts(counts, settings, quick=args.quick, groups=read_groups(args.groups), progress=console.step,
                     progressbar=console.tty and not console.quiet, experiments=tests)
    fit.save(out)
    return _finish(fit, f"fit written to {out}", args, console)


def _finish(fit, where: str, args, console) -> int:
    """Print the result and where it went; exit 3 for a non-converged fit under --strict."""
    console.out(fit.render())
    console.out()
    console.out(where)
    return 3 if args.strict and not fit.converged and fit.mode == "full" else 0


def _fit_workspace(args, console) -> int:
    from liftpool.data_prep.errors import InputError
    from liftpool.workspace import Workspace

    if args.counts or args.out:
        raise InputError(problem="--counts and --out cannot be used with a workspace",
                         fix="the workspace's current counts are fitted into WS/fits/<id>")
    ws = Workspace.open(args.workspace)
    overrides = overrides_from_args(args)
    with ws.lock("fit"):
        fid, fit = ws.fit(quick=args.quick, progress=console.step, progressbar=console.tty and not console.quiet,
                          groups=read_groups(args.groups), experiments=args.experiments, **overrides)
    return _finish(fit, f"fit {fid} written to {ws.path / 'fits' / fid}", args, console)
