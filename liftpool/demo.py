"""``liftpool demo``: the whole pipeline on the invented Fernhollow scenario."""

from __future__ import annotations

from pathlib import Path

from liftpool.console import Console

__all__ = ["run_demo"]


def run_demo(folder: Path, seed: int = 20261201, console: Console | None = None) -> int:
    """Simulate the scenario into ``folder/data``, prepare counts, and run every later stage present."""
    from liftpool.data_prep import CountingRules, prepare_counts, write_scenario
    from liftpool.data_prep.io import write_json, write_table

    console = console or Console()
    folder = Path(folder)
    data = folder / "data"
    console.step(f"simulating the invented scenario 'Fernhollow Home & Garden' into {data}")
    paths = write_scenario(data, seed=seed)
    rules = CountingRules(unexposed=True)
    res = prepare_counts(paths["impressions"], paths["conversions"], paths["outcomes"], users=paths["users"],
                         spend=paths["spend"], rules=rules, progress=console.step)
    from liftpool.data_prep.io import file_sha256

    res.summary.totals["input_sha256"] = {k: file_sha256(p) for k, p in paths.items() if k != "truth"}
    counts_path = write_table(res.counts, folder / "counts.parquet")
    write_json(res.summary.to_dict(), folder / "counts.summary.json")
    console.out(res.summary.render())
    console.out()
    console.out(f"counts: {counts_path}")
    from liftpool import pipeline

    return pipeline.demo_after_prepare(folder, res, paths, console, seed=seed)
