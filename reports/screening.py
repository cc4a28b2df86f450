"""Screening outputs: the balance figure and the report appendix table."""

from __future__ import annotations

import io

import matplotlib as mpl
import numpy as np

from liftpool.reports.figures import STYLE, new_figure, plain_text

__all__ = ["balance_figure", "appendix_table"]


def _label(cov: str, level: str) -> str:
    return cov if not level else f"{cov} = {level}"


def balance_figure(result) -> bytes:
    """Users-weighted mean |SMD| over campaigns per covariate (and level), before and after stratification.

    Open circles are before, filled dots after stratifying on the suggested covariates; the dashed
    line is the 0.1 flag (Austin 2009).
    """
    summ = result.balance_summary()
    labels = [_label(c, lv) for c, lv in zip(summ["covariate"], summ["level"], strict=True)]
    y = np.arange(len(labels))[::-1]
    with mpl.rc_context(STYLE):
        fig, ax = new_figure((7.2, 0.26 * len(labels) + 1.4))
        ax.scatter(summ["mean_abs_smd_before"], y, facecolors="white", edgecolors="black", s=28, zorder=3,
                   label="before (no cells)")
        ax.scatter(summ["mean_abs_smd_after"], y, color="black", s=16, zorder=4,
                   label="after: " + (plain_text(", ".join(result.suggested)) if result.suggested else "no cells suggested"))
        for yy, a, b in zip(y, summ["mean_abs_smd_before"], summ["mean_abs_smd_after"], strict=True):
            ax.plot([a, b], [yy, yy], color="0.6", linewidth=0.8, zorder=2)
        ax.axvline(0.1, color="black", linestyle="--", linewidth=0.8)
        ax.set_yticks(y)
        ax.set_yticklabels([plain_text(x) for x in labels], fontsize=7.5)
        ax.set_xlabel("|standardized mean difference| seen vs unseen (users-weighted mean over campaigns)")
        ax.set_xlim(left=0)
        ax.legend(frameon=False, fontsize=8, loc="lower right")
        buf = io.BytesIO()
        fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()


def appendix_table(result):
    """The ranking and the balance summary as report tables (DataFrames with units in the headers)."""
    r = result.ranking.rename(columns={
        "bias_without": "placebo bias, no cells (log odds)", "bias_with": "placebo bias, with it (log odds)",
        "bias_removed": "bias removed (log odds)", "mean_abs_smd": "mean |SMD| before",
        "campaigns_flagged": "campaigns |SMD| > 0.1", "placebo_association": "placebo association (|SMD|)",
        "users_lost": "user-campaign pairs lost"})
    r = r.drop(columns=["bias_with_sd"], errors="ignore")
    return r, result.balance_summary()
