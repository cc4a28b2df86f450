"""Planning outputs: the width-against-users figure and the plan folder (JSON, CSV, PNG)."""

from __future__ import annotations

import io
import math
from pathlib import Path

import matplotlib as mpl
import numpy as np

from liftpool.data_prep.io import atomic_folder, write_json, write_table
from liftpool.models.planning import Plan, width_curve
from liftpool.reports.figures import (
    STYLE,
    new_figure,
)

__all__ = ["plan_figure", "write_plan", "plan_users_grid"]

LINESTYLES = ["-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1))]


def plan_users_grid(p: Plan, n: int = 60) -> np.ndarray:
    """Users from 1/100 to 100 times the planned users (log-spaced), for the figure."""
    return np.logspace(math.log10(p.inputs.users) - 2, math.log10(p.inputs.users) + 2, n)


def plan_figure(p: Plan, placebo_counts=(1, 2, 4, 8, 16)) -> tuple[bytes, object]:
    """Expected interval width against users, one line per placebo count, with each floor dashed.

    Returns
    -------
    png : bytes
    curve : DataFrame
        The plotted values (``placebos, users, width, floor_width``).
    """
    inp = p.inputs
    counts = placebo_counts if inp.bias else (0,)
    curve = width_curve(inp, plan_users_grid(p), placebo_counts=counts)
    with mpl.rc_context(STYLE):
        fig, ax = new_figure((7.2, 4.2))
        for i, (m, g) in enumerate(curve.groupby("placebos", sort=True)):
            ls = LINESTYLES[i % len(LINESTYLES)]
            label = f"{m} placebo outcome{'s' if m != 1 else ''}" if inp.bias else "no bias terms"
            ax.plot(g["users"], 100 * g["width"], color="black", linestyle=ls, linewidth=1.3, label=label)
            if inp.bias:
                ax.axhline(100 * g["floor_width"].iloc[0], color="0.6", linestyle=ls, linewidth=0.8)
        ax.plot([inp.users], [100 * p.width], marker="o", color="black", linestyle="none",
                label=f"planned: {inp.users:,.0f} users")
        ax.set_xscale("log")
        ax.set_xlabel("exposed users of the campaign (seen + unseen), log scale")
        ax.set_ylabel(f"expected width of the {100 * inp.level:.0f}% interval\n(relative-lift points)")
        ax.set_title("Interval width against users; grey lines are the floors more users cannot pass",
                     fontsize=9)
        ax.set_ylim(bottom=0)
        ax.legend(frameon=False, fontsize=8)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue(), curve


def write_plan(p: Plan, out: str | Path, simulation: dict | None = None) -> Path:
    """Write ``plan.json``, ``width_curve.csv`` and ``width_vs_users.png`` into a new folder ``out``."""
    png, curve = plan_figure(p)
    out = Path(out)
    with atomic_folder(out) as tmp:
        doc = p.to_dict()
        if simulation is not None:
            doc["simulation"] = simulation
        write_json(doc, tmp / "plan.json")
        write_table(curve, tmp / "width_curve.csv")
        (tmp / "width_vs_users.png").write_bytes(png)
    return out
