"""Report figures (matplotlib, PNG).

The design is plain and print-friendly: black and greys only, with shapes and line styles
carrying the distinctions, so the figures read in grayscale and by colour-blind readers.
"""

from __future__ import annotations

import io

import matplotlib as mpl
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from liftpool.reports.money import fmt_prob
from liftpool.reports.tables import KIND_OF_ROW, ReportTables

__all__ = ["make_figures", "new_figure", "png_bytes", "plain_text"]

STYLE = {"font.size": 9, "axes.edgecolor": "black", "axes.grid": True, "grid.color": "0.88",
         "grid.linewidth": 0.6, "axes.spines.top": False, "axes.spines.right": False, "savefig.dpi": 130,
         "font.family": "DejaVu Sans"}
#: Rows a figure shows at most; beyond it the largest are shown and the title says how many of how many
#: (the tables keep every row). A 300-campaign report stays readable and small.
MAX_ROWS = 30
#: Campaigns whose names label the shrinkage and naive-to-corrected figures at most.
MAX_LABELS = 15
MARK = {"naive": ("D", "0.65", "naive (served vs not)"), "uncorrected": ("s", "0.4", "uncorrected (cells)"),
        "corrected": ("o", "black", "bias-corrected")}


def new_figure(figsize, **subplots):
    """A figure and its axes, drawn by the Agg canvas directly: pyplot's global state and the user's
    backend (a notebook's, say) are left alone. ``subplots`` go to :meth:`Figure.subplots`."""
    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    return fig, fig.subplots(**subplots)


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()


def plain_text(text: str) -> str:
    """A user's string as literal text in a figure: no mathtext (``$...$``) interpretation."""
    return str(text).replace("$", r"\$")


_plain = plain_text


#: The least distance between tick labels on a lift axis (inches): +100%, +200% and +500% sit close on
#: the compressed scale and used to print over each other.
MIN_TICK_GAP_IN = 0.5


def _spaced_ticks(ax, candidates, axis: str = "x", min_gap_in: float = MIN_TICK_GAP_IN) -> list[float]:
    """The candidate ticks within the axis's limits, dropping any closer than ``min_gap_in`` to the last
    kept one on the page (the axis's scale and limits must be set)."""
    lo, hi = sorted(ax.get_xlim() if axis == "x" else ax.get_ylim())
    vals = sorted(v for v in candidates if lo <= v <= hi)
    dpi = ax.figure.dpi
    pts = [ax.transData.transform((v, 0) if axis == "x" else (0, v))[0 if axis == "x" else 1] / dpi for v in vals]
    kept, last = [], None
    for v, pt in zip(vals, pts, strict=True):
        crowded = last is not None and abs(pt - last) < min_gap_in
        if crowded and v == 0:  # 0 always shows: it replaces the neighbour it crowds
            kept.pop()
        if not crowded or v == 0:
            kept.append(v)
            last = pt
    return kept


def _place_labels(ax, items, fontsize: float = 7) -> None:
    """Annotate points with names that never overlap: each name (in the order given, most important
    first) takes the first free place around its point; a name with no free place is left out."""
    renderer = ax.figure.canvas.get_renderer()
    placed = []
    offsets = ((4, 4, "left", "bottom"), (4, -4, "left", "top"), (-4, 4, "right", "bottom"),
               (-4, -4, "right", "top"), (6, 0, "left", "center"), (-6, 0, "right", "center"),
               (0, 8, "center", "bottom"), (0, -8, "center", "top"), (10, 14, "left", "bottom"),
               (10, -14, "left", "top"), (-10, 14, "right", "bottom"), (-10, -14, "right", "top"),
               (0, 22, "center", "bottom"), (0, -22, "center", "top"))
    for name, x, y in items:
        for dx, dy, ha, va in offsets:
            a = ax.annotate(name, (x, y), fontsize=fontsize, xytext=(dx, dy), textcoords="offset points", ha=ha, va=va)
            box = a.get_window_extent(renderer)
            if not any(box.overlaps(b) for b in placed):
                placed.append(box)
                break
            a.remove()


def _dodged(ax, x: float, ys, min_gap_pt: float) -> list[float]:
    """Vertical text offsets (points) that keep labels at (x, y) at least ``min_gap_pt`` apart, each as
    near its own y as the others allow (1-D: order kept, clusters centred on their points)."""
    ys = np.asarray(ys, float)
    px = np.array([ax.transData.transform((x, y))[1] for y in ys]) * 72.0 / ax.figure.dpi
    order = np.argsort(px)
    pos = px[order].copy()
    # sweep up, then centre each run of touching labels on its points
    groups = [[0]]
    for i in range(1, len(pos)):
        if pos[i] - pos[groups[-1][-1]] < min_gap_pt:
            groups[-1].append(i)
        else:
            groups.append([i])
    changed = True
    while changed:
        changed = False
        for g in groups:
            centre = px[order][g].mean()
            start = centre - (len(g) - 1) * min_gap_pt / 2
            pos[g] = start + min_gap_pt * np.arange(len(g))
        merged = [groups[0]]
        for g in groups[1:]:
            if pos[g[0]] - pos[merged[-1][-1]] < min_gap_pt:
                merged[-1] = merged[-1] + g
                changed = True
            else:
                merged.append(g)
        groups = merged
    out = np.empty_like(pos)
    out[order] = pos - px[order]
    return list(out)


def _row_label(r: dict) -> str:
    return _plain(r["campaign"]) if r["row"] == "campaign" else KIND_OF_ROW[r["row"]]


def _biggest(rows: list[dict], key: str, n: int) -> list[dict]:
    """The ``n`` rows largest in ``key`` (keeping their order); all when there are at most ``n``."""
    if len(rows) <= n:
        return rows
    keep = set(np.argsort([-(r.get(key) or 0) for r in rows], kind="stable")[:n])
    return [r for i, r in enumerate(rows) if i in keep]


def _lift_figure(t: ReportTables) -> bytes:
    camps = [r for r in t.results.to_dict(orient="records") if r["row"] == "campaign"]
    shown = _biggest(camps, "users_seen", MAX_ROWS)
    res = shown + [r for r in t.results.to_dict(orient="records") if r["row"] == "portfolio"]
    fig, ax = new_figure((7.2, 0.42 * len(res) + 1.3))
    y = np.arange(len(res))[::-1]
    xmax = 0.0
    for j, key in enumerate(("naive", "uncorrected", "corrected")):
        m, color, label = MARK[key]
        q = {"naive": "lift_naive", "uncorrected": "lift_uncorrected", "corrected": "lift"}[key]
        first = True
        for yi, r in zip(y, res, strict=True):
            off = (1 - j) * 0.22
            med = r.get(q, np.nan)
            if not np.isfinite(med):
                continue
            if key != "naive":
                lo, hi = r[q + "_lower"], r[q + "_upper"]
                ax.plot([lo, hi], [yi + off] * 2, "-", color=color, linewidth=1.6)
                xmax = max(xmax, hi)
            ax.plot([med], [yi + off], m, color=color, markersize=5, label=label if first else None)
            first = False
            xmax = max(xmax, med)
    ax.axvline(0, color="black", linewidth=0.8)
    ax.set_yticks(y, [_row_label(r) for r in res])
    ax.set_xscale("symlog", linthresh=1.0)
    ax.autoscale_view()
    ticks = _spaced_ticks(ax, (-0.5, -0.25, 0, 0.25, 0.5, 1, 2, 5, 10, 20, 50))
    ax.set_xticks(ticks, [f"{v:+.0%}" for v in ticks])
    ax.set_xlabel(f"lift among seen users (median and {t.level:.0%} interval; scale compressed above +100%)")
    ax.legend(loc="lower right", fontsize=8, frameon=True)
    more = f" ({len(shown)} largest of {len(camps)} campaigns; the table lists all)" if len(shown) < len(camps) else ""
    present = [name for name, q in (("naive", "lift_naive"), ("uncorrected", "lift_uncorrected"),
                                    ("bias-corrected", "lift")) if any(np.isfinite(r.get(q, np.nan)) for r in res)]
    ax.set_title("Lift by campaign: " + (", ".join(present[:-1]) + " and " + present[-1] if len(present) > 1
                                         else present[0]) + more)
    return png_bytes(fig)


def _placebo_figure(t: ReportTables) -> bytes | None:
    p = t.placebos
    if p.empty:
        return None
    n_all = len(p)
    if n_all > MAX_ROWS:  # the placebos that reveal the most bias
        p = p.loc[p["before correction, median (log odds)"].abs().sort_values(ascending=False).index[:MAX_ROWS]]
        p = p.sort_index().reset_index(drop=True)
    L = int(round(t.level * 100))
    fig, ax = new_figure((7.2, 0.36 * len(p) + 1.2))
    y = np.arange(len(p))[::-1]
    for (col, lo, hi), m, color, off, label in (
            (("before correction, median (log odds)", f"before, {L}% lower", f"before, {L}% upper"), "s", "0.45", 0.15,
             "before correction"),
            (("after correction, median (log odds)", f"after, {L}% lower", f"after, {L}% upper"), "o", "black", -0.15,
             "after correction")):
        ax.hlines(y + off, p[lo], p[hi], color=color, linewidth=1.6)
        ax.plot(p[col], y + off, m, color=color, markersize=5, label=label)
    ax.axvline(0, color="black", linewidth=0.8, linestyle="--")
    ax.set_yticks(y, [_plain(f"{c} | {o}") for c, o in zip(p["campaign"], p["placebo outcome"], strict=True)])
    ax.set_xlabel(f"seen-vs-unseen effect on the placebo outcome, log odds ({L}% interval); 0 = no bias")
    more = (f" ({len(p)} with the largest bias of {n_all}; the appendix lists all)" if len(p) < n_all else "")
    ax.set_title("Placebo check: bias before and after the correction" + more)
    ax.legend(loc="best", fontsize=8)
    return png_bytes(fig)


def _shrinkage_figure(t: ReportTables) -> bytes:
    s = t.shrinkage
    fig, ax = new_figure((5.6, 4.4))
    size = 20 + 300 * np.sqrt(s["target conversions"] / max(1, s["target conversions"].max()))
    ax.errorbar(s["alone (log odds)"], s["pooled, median (log odds)"],
                yerr=[s["pooled, median (log odds)"] - s["pooled lower"], s["pooled upper"] - s["pooled, median (log odds)"]],
                fmt="none", ecolor="0.6", linewidth=1)
    ax.scatter(s["alone (log odds)"], s["pooled, median (log odds)"], s=size, facecolor="white", edgecolor="black",
               zorder=3)
    lim = [min(s["alone (log odds)"].min(), s["pooled lower"].min()) - 0.05,
           max(s["alone (log odds)"].max(), s["pooled upper"].max()) + 0.05]
    ax.plot(lim, lim, ":", color="black", linewidth=1, label="no pooling (pooled = alone)")
    ax.autoscale_view()
    biggest = s["target conversions"].sort_values(ascending=False).index[:MAX_LABELS]
    _place_labels(ax, [(_plain(s.loc[i, "campaign"]), s.loc[i, "alone (log odds)"],
                        s.loc[i, "pooled, median (log odds)"]) for i in biggest])
    ax.set_xlabel("campaign alone: target minus its own placebos (log odds)")
    ax.set_ylabel("pooled estimate (median, log odds)")
    ax.set_title("Shrinkage: small campaigns borrow strength\n(circle area ~ target conversions)")
    ax.legend(loc="upper left", fontsize=8)
    return png_bytes(fig)


def _steps_figure(t: ReportTables) -> bytes:
    c = t.campaigns
    if len(c) > MAX_LABELS:  # the largest campaigns: more lines would only tangle
        c = c.loc[c["users_seen"].astype(float).sort_values(ascending=False).index[:MAX_LABELS]].reset_index(drop=True)
    cols = [("lift_naive", "naive"), ("lift_uncorrected", "uncorrected"), ("lift", "bias-corrected")]
    cols = [(k, lab) for k, lab in cols if k in c.columns and c[k].notna().any()]
    fig, ax = new_figure((6.4, 4.2))
    x = np.arange(len(cols))
    styles = ["-", "--", "-.", ":"]
    for i in range(len(c)):
        vals = [c.loc[i, k] for k, _ in cols]
        ax.plot(x, vals, styles[i % 4], marker="o", color="black" if i % 2 == 0 else "0.45", linewidth=1,
                markersize=4)
    ax.set_xticks(x, [lab for _, lab in cols])
    ax.set_yscale("symlog", linthresh=1.0)
    ax.axhline(0, color="black", linewidth=0.8)
    ax.set_xlim(-0.2, len(cols) - 1 + 0.9)
    ax.autoscale_view(scalex=False)
    ticks = _spaced_ticks(ax, (-0.5, -0.25, 0, 0.1, 0.25, 0.5, 1, 2, 5, 10), axis="y", min_gap_in=0.22)
    ax.set_yticks(ticks, [f"{v:+.0%}" for v in ticks])
    # each name beside its line's end, moved apart just enough not to overlap (7 pt text: 9 pt apart)
    ends = [float(c.loc[i, cols[-1][0]]) for i in range(len(c))]
    for name, yv, dy in zip(c["campaign"], ends, _dodged(ax, x[-1], ends, 9.0), strict=True):
        ax.annotate(_plain(name), (x[-1], yv), fontsize=7, xytext=(5, dy), textcoords="offset points", va="center")
    ax.set_ylabel("lift (median)")
    n_all = len(t.campaigns)
    ax.set_title("From naive to bias-corrected, per campaign"
                 + (f" ({len(c)} largest of {n_all})" if len(c) < n_all else ""))
    return png_bytes(fig)


def _roas_figure(t: ReportTables) -> bytes | None:
    if "return_on_ad_spend" not in t.results.columns:
        return None
    res = [r for r in t.results.to_dict(orient="records") if np.isfinite(r.get("return_on_ad_spend", np.nan))]
    if not res:
        return None
    camps = [r for r in res if r["row"] == "campaign"]
    shown = _biggest(camps, "spend", MAX_ROWS)
    res = shown + [r for r in res if r["row"] != "campaign"]
    fig, ax = new_figure((7.2, 0.42 * len(res) + 1.3))
    y = np.arange(len(res))[::-1]
    for yi, r in zip(y, res, strict=True):
        lo, hi = r["return_on_ad_spend_lower"], r["return_on_ad_spend_upper"]
        ax.hlines(yi, lo, hi, color="0.5", linewidth=1.4)
        ax.plot([r["return_on_ad_spend"]], [yi], "o", color="white", markeredgecolor="black", markersize=5, zorder=3)
        ax.annotate(f"chance it paid for itself {fmt_prob(r['p_paid_for_itself'])}", (hi, yi), fontsize=7, xytext=(5, 0),
                    textcoords="offset points", va="center")
    ax.axvline(1.0, color="black", linewidth=1, linestyle="--")
    ax.set_yticks(y, [_row_label(r) for r in res])
    ax.set_xlabel(f"return on ad spend: incremental revenue / spend (median and {t.level:.0%} interval); "
                  "1 = break-even")
    ax.set_title("Did it pay for itself? Posterior of return on ad spend"
                 + (f" ({len(shown)} largest spends of {len(camps)})" if len(shown) < len(camps) else ""))
    return png_bytes(fig)


def _heldout_placebo_figure(t: ReportTables) -> bytes | None:
    h = t.heldout_placebos
    if h is None or h.empty:
        return None
    n_all = len(h)
    lo_c, hi_c = [c for c in h.columns if c.startswith("predicted, ")][:2]
    if n_all > MAX_ROWS:  # those furthest outside (or nearest the edge of) their intervals
        mid, half = (h[lo_c] + h[hi_c]) / 2, (h[hi_c] - h[lo_c]) / 2
        h = h.loc[((h["estimate (log odds)"] - mid).abs() / half).sort_values(ascending=False).index[:MAX_ROWS]]
        h = h.sort_index()
    fig, ax = new_figure((7.2, 0.36 * len(h) + 1.3))
    y = np.arange(len(h))[::-1]
    ax.hlines(y, h[lo_c], h[hi_c], color="0.45", linewidth=2.2, label="predicted from the rest (interval)")
    inside = h["inside"].to_numpy(bool)
    ax.plot(h["estimate (log odds)"][inside], y[inside], "o", color="black", markersize=5, label="estimate, inside")
    if (~inside).any():
        ax.plot(h["estimate (log odds)"][~inside], y[~inside], "x", color="black", markersize=7, mew=1.6,
                label="estimate, outside")
    ax.set_yticks(y, [_plain(f"{c} | {o}") for c, o in zip(h["campaign"], h["placebo outcome"], strict=True)])
    ax.set_xlabel("seen-vs-unseen effect on the placebo outcome, log odds")
    n_in = int(t.heldout_placebos["inside"].sum())
    more = f"; {len(h)} furthest out shown" if len(h) < n_all else ""
    ax.set_title(f"Each placebo predicted without itself: {n_in} of {n_all} inside{more}")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.6 / (0.36 * len(h) + 1.3)), ncol=3, fontsize=8, frameon=False)
    return png_bytes(fig)


def _tests_figure(t: ReportTables) -> bytes | None:
    d = t.tests
    if d is None or d.empty:
        return None
    cols = list(d.columns)
    tl, tu = cols[3], cols[4]
    wl, wu = cols[6], cols[7]
    fig, ax = new_figure((7.2, 0.62 * len(d) + 1.4))
    y = np.arange(len(d))[::-1]
    for off, (lo, hi, med), m, color, label in (
            (0.2, (tl, tu, "test lift among exposed"), "D", "black", "randomized test"),
            (0.0, (wl, wu, "model without the test, median"), "s", "0.45", "model without this test"),
            (-0.2, (None, None, "model with all tests, median"), "o", "black", "model with all tests")):
        if lo is not None:
            ax.hlines(y + off, d[lo], d[hi], color=color, linewidth=1.8)
        ax.plot(d[med], y + off, m, color=color, markersize=5, markerfacecolor="white" if m == "o" else color,
                label=label)
    ax.axvline(0, color="black", linewidth=0.8)
    ax.set_yticks(y, [_plain(str(n)) if str(c) in str(n) else _plain(f"{c} ({n})")
                      for c, n in zip(d["campaign"], d["test"], strict=True)])
    ticks = _spaced_ticks(ax, (-0.5, -0.25, -0.1, 0, 0.1, 0.25, 0.5, 1.0))
    ax.set_xticks(ticks, [f"{v:+.0%}" for v in ticks])
    ax.set_xlabel(f"lift among exposed users (median and {t.level:.0%} interval)")
    ax.set_title(f"Randomized tests against the model: {int(d['inside'].sum())} of {len(d)} predicted")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.7 / (0.62 * len(d) + 1.4)), ncol=3, fontsize=8,
              frameon=False)
    return png_bytes(fig)


def _sensitivity_figure(t: ReportTables) -> bytes | None:
    from liftpool.models.sensitivity import sensitivity_curve

    if t.tipping is None or "users_seen" not in t.estimands:
        return None
    rows = [r for r in t.results.to_dict(orient="records") if r["row"] == "portfolio"]
    camps = _biggest([r for r in t.results.to_dict(orient="records") if r["row"] == "campaign"], "users_seen", 3)
    units = rows + camps
    if not units:
        return None
    tips = [r.get("tip_interval", np.nan) for r in units]
    top = max([0.3] + [1.4 * x for x in tips if np.isfinite(x) and x > 0])
    deltas = np.linspace(0.0, min(top, 2.0), 31)
    fig, axes = new_figure((7.2, 2.3 * ((len(units) + 1) // 2) + 0.4), nrows=(len(units) + 1) // 2, ncols=2,
                           squeeze=False, sharex=True)
    for ax, r in zip(axes.ravel(), units, strict=False):
        c = sensitivity_curve(t.estimands, r["campaign"], t.level, deltas)
        ax.fill_between(c["delta"], c["lower"], c["upper"], color="0.85", label=f"{t.level:.0%} interval")
        ax.plot(c["delta"], c["median"], "-", color="black", linewidth=1.4, label="median")
        ax.axhline(0, color="black", linewidth=0.8)
        tip = r.get("tip_interval", np.nan)
        if np.isfinite(tip) and 0 < tip <= deltas[-1]:
            ax.axvline(tip, color="black", linestyle=":", linewidth=1.2)
            ax.annotate(f"{tip:.2f}", (tip, ax.get_ylim()[1]), fontsize=7, ha="left", va="top",
                        xytext=(2, -2), textcoords="offset points")
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:+.0%}"))
        ax.set_title(_row_label(r), fontsize=9)
    for ax in axes.ravel()[len(units):]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("extra target-only bias (log odds)")
    axes.ravel()[0].legend(loc="upper right", fontsize=7)
    fig.suptitle("Lift as the target's own bias exceeds its placebos' (dotted: the lower end reaches 0)", fontsize=9)
    return png_bytes(fig)


def make_figures(t: ReportTables) -> dict[str, bytes]:
    """All figures as PNG bytes, by file name."""
    with mpl.rc_context(STYLE):
        figs = {"lift_by_campaign.png": _lift_figure(t),
                "placebo_check.png": _placebo_figure(t),
                "placebo_heldout.png": _heldout_placebo_figure(t),
                "randomized_tests.png": _tests_figure(t),
                "sensitivity.png": _sensitivity_figure(t),
                "shrinkage.png": _shrinkage_figure(t),
                "naive_to_corrected.png": _steps_figure(t),
                "return_on_ad_spend.png": _roas_figure(t)}
    return {k: v for k, v in figs.items() if v is not None}
