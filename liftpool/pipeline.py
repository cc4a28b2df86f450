"""The stages after data preparation, as run by ``liftpool demo``."""

from __future__ import annotations

from pathlib import Path

from liftpool.console import Console

__all__ = ["demo_after_prepare"]


def demo_after_prepare(folder: Path, prep, paths: dict, console: Console, seed: int) -> int:
    """Quick fit, full fit and (when the reports layer is present) the report of the demo."""
    import pandas as pd

    from liftpool.models import ModelSettings, fit_counts

    fits = folder / "fits"
    console.step("fitting the quick mode (seconds)")
    quick = fit_counts(prep.counts, ModelSettings(seed=seed), quick=True, progress=console.step)
    quick.save(fits / "quick")
    console.step("fitting the full hierarchical model (a minute or two on 2 cores)")
    full = fit_counts(prep.counts, ModelSettings(seed=seed), progress=console.step,
                      progressbar=console.tty and not console.quiet)
    full.save(fits / "full")
    console.out()
    console.out(full.render())
    truth = pd.read_csv(paths["truth"]).set_index("campaign")
    lift = full.table("lift")
    covered = ((lift["lower"] <= truth.loc[lift.index, "true_lift"])
               & (truth.loc[lift.index, "true_lift"] <= lift["upper"]))
    console.out()
    console.out(f"known truth (invented scenario): the {full.settings.level:.0%} interval covers the true lift "
                f"for {int(covered.sum())} of {len(covered)} campaigns")
    console.out(f"quick fit: {fits / 'quick'}")
    console.out(f"full fit:  {fits / 'full'}")
    from liftpool.reports import write_report

    console.step("writing the report")
    out = write_report(fits / "full", folder / "report", prep_summary=prep.summary, spend=prep.spend)
    console.out(f"report: {(out / 'report.html').resolve()}")
    return 0
