"""``liftpool demo``: the whole pipeline on the invented Fernhollow scenario, in a fresh workspace."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from liftpool.console import Console

__all__ = ["run_demo"]


def run_demo(folder: Path, seed: int = 20261201, console: Console | None = None) -> int:
    """Simulate the scenario, create a workspace on it, prepare, fit (quick and full) and report."""
    from liftpool.data_prep import write_scenario
    from liftpool.data_prep.errors import InputError
    from liftpool.workspace import CONFIG_NAME, Workspace

    console = console or Console()
    folder = Path(folder)
    if (folder / CONFIG_NAME).exists() or (folder.exists() and any(folder.iterdir())):
        raise InputError(problem="the demo needs a new, empty folder", file=str(folder),
                         fix="remove it (make clean) or give another folder: liftpool demo OTHER")
    data = folder / "data"
    console.step(f"simulating the invented scenario 'Fernhollow Home & Garden' into {data}")
    paths = write_scenario(data, seed=seed)
    ws = Workspace.init(folder, paths["impressions"], [paths["conversions"]], [paths["outcomes"]],
                        users=paths["users"], spend=paths["spend"], experiments=paths.get("experiments"),
                        counting={"unexposed": True},
                        model={"seed": seed})
    with ws.lock("demo"):
        summary = ws.prepare(progress=console.step)
        console.out(summary.render())
        console.step("fitting the quick mode (seconds)")
        qid, _ = ws.fit(quick=True, progress=console.step)
        console.step("fitting the full hierarchical model (about a minute and a half on 2 cores)")
        fid, full = ws.fit(progress=console.step, progressbar=console.tty and not console.quiet)
        console.out()
        console.out(full.render())
        truth = pd.read_csv(paths["truth"]).set_index("campaign")
        lift = full.table("lift")
        t = truth.loc[lift.index, "true_lift"]
        covered = (lift["lower"] <= t) & (t <= lift["upper"])
        console.out()
        console.out(f"known truth (invented scenario): the {full.settings.level:.0%} interval covers the true lift "
                    f"for {int(covered.sum())} of {len(covered)} campaigns")
        out = ws.report(fid, progress=console.step)
    console.out(f"workspace: {ws.path.resolve()} (fits {qid} and {fid})")
    console.out(f"report: {(out / 'report.html').resolve()}")
    return 0
