"""How estimates moved between two fits: a table and a figure."""

from __future__ import annotations

import numpy as np
import pandas as pd

from liftpool.models.fit import FitResult
from liftpool.reports.figures import STYLE, png_bytes

__all__ = ["compare_fits", "CHANGE_LIFT", "CHANGE_WIDTH"]

#: The change columns: differences of lifts (fractions), i.e. percentage points over 100.
CHANGE_LIFT = "change in lift median (percentage points / 100)"
CHANGE_WIDTH = "change in interval width (percentage points / 100)"
#: The narrowest span of the bias axis (log odds): differences smaller than this look small.
MIN_BIAS_SPAN = 0.2


def compare_fits(a: FitResult, b: FitResult, name_a: str, name_b: str) -> tuple[pd.DataFrame, bytes]:
    """Per campaign: the bias and the lift interval in each fit, and the change."""
    import matplotlib as mpl
    from matplotlib.ticker import FuncFormatter

    from liftpool.reports.figures import new_figure, plain_text

    qa = "lift" if a.corrected else "lift_uncorrected"
    qb = "lift" if b.corrected else "lift_uncorrected"
    la, lb = a.table(qa), b.table(qb)
    ba, bb = a.table("bias"), b.table("bias")
    camps = sorted(set(la.index) | set(lb.index))
    rows = []
    for c in camps:
        r = {"campaign": c}
        for tag, lt, bt in ((name_a, la, ba), (name_b, lb, bb)):
            if c in lt.index:
                r[f"lift median ({tag})"] = lt.loc[c, "median"]
                r[f"lift lower ({tag})"] = lt.loc[c, "lower"]
                r[f"lift upper ({tag})"] = lt.loc[c, "upper"]
                r[f"interval width ({tag})"] = lt.loc[c, "upper"] - lt.loc[c, "lower"]
            r[f"bias median, log odds ({tag})"] = bt.loc[c, "median"] if c in bt.index else np.nan
        r[CHANGE_LIFT] = r.get(f"lift median ({name_b})", np.nan) - r.get(f"lift median ({name_a})", np.nan)
        r[CHANGE_WIDTH] = (r.get(f"interval width ({name_b})", np.nan)
                                         - r.get(f"interval width ({name_a})", np.nan))
        rows.append(r)
    table = pd.DataFrame(rows)
    pooled = {"campaign": "(pooled bias mean, log odds)"}
    for tag, f in ((name_a, a), (name_b, b)):
        if "bias_mean" in f.idata.posterior:
            d = f.idata.posterior["bias_mean"].values.ravel()
            pooled[f"bias median, log odds ({tag})"] = float(np.median(d))
    table = pd.concat([table, pd.DataFrame([pooled])], ignore_index=True)
    # a comparison is only as good as its fits: say when one was not checked or did not pass
    table.attrs["warnings"] = [
        f"fit {tag} did not converge: its numbers are not reliable, and neither is how they moved" if f.mode == "full"
        else f"fit {tag} is a quick fit (no sampler checks): an approximation for screening"
        for tag, f in ((name_a, a), (name_b, b)) if f.mode != "full" or not f.converged]
    with mpl.rc_context(STYLE):
        fig, (ax1, ax2) = new_figure((9, 0.45 * len(camps) + 1.4), nrows=1, ncols=2, sharey=True,
                                       gridspec_kw={"width_ratios": [3, 2]})
        y = np.arange(len(camps))[::-1]
        for tag, off, color, m in ((name_a, 0.15, "0.55", "s"), (name_b, -0.15, "black", "o")):
            t = table.set_index("campaign").loc[camps]
            if f"lift median ({tag})" in t:
                ax1.hlines(y + off, t[f"lift lower ({tag})"], t[f"lift upper ({tag})"], color=color, linewidth=1.6)
                ax1.plot(t[f"lift median ({tag})"], y + off, m, color=color, label=f"fit {tag}")
            ax2.plot(t[f"bias median, log odds ({tag})"], y + off, m, color=color, label=f"fit {tag}")
        ax1.axvline(0, color="black", linewidth=0.8)
        ax1.set_yticks(y, [plain_text(c) for c in camps])
        ax1.set_xlabel("lift (median and interval)")
        ax1.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:+.0%}"))
        # the legend under the panels, never over an interval
        ax1.legend(fontsize=8, loc="upper left", bbox_to_anchor=(0.0, -0.12), ncol=2, frameon=False)
        ax2.set_xlabel("bias on the target (log odds)")
        # a bias axis at least MIN_BIAS_SPAN wide: a change of 0.01 log odds must not fill the panel
        vals = table[[c for c in table.columns if c.startswith("bias median")]].to_numpy(float)
        vals = vals[np.isfinite(vals)]
        if vals.size:
            mid, half = (vals.max() + vals.min()) / 2, max((vals.max() - vals.min()) / 2 * 1.15, MIN_BIAS_SPAN / 2)
            ax2.set_xlim(mid - half, mid + half)
        ax1.set_title(f"How the estimates moved: fit {name_a} to fit {name_b}", loc="left")
        png = png_bytes(fig)
    return table, png
