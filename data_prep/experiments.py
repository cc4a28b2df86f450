"""Randomized tests as evidence: read a tests file and convert each result to liftpool's estimand.

A randomized holdout test reports the relative lift of a test group (assigned to see the ads) over
a control group, with its standard error.  liftpool's estimand is the lift among users who saw an
ad, so a test that reports the effect on everyone assigned is converted with the usual
non-compliance adjustment (Bloom 1984, Evaluation Review 8(2)): the effect among the exposed is the
intent-to-treat effect divided by the exposed share of the test group.  On the relative scale::

    exposed lift = assigned lift / exposed share,   its standard error = assigned se / exposed share

which assumes (1) the ads changed nothing for assigned users who never saw one, (2) the exposed
users would have converted at the control group's rate without the ads (if they convert more
anyway, as heavy browsers do, the division overstates their relative lift by that ratio), and (3)
the exposed share is known (its own sampling error is ignored).  The model works on the log scale:
``log(1 + lift)`` with the delta-method standard error ``se / (1 + lift)``; for conversion rates of a
few percent this is the log odds ratio to within a few thousandths.

The file: ``campaign, estimate, std_error, measures[, exposed_share][, test]``; ``measures`` is one
of :data:`MEASURES`.  What cannot be converted is refused (:class:`InputError`, exit 2).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from liftpool.data_prep.errors import BadRow, InputError
from liftpool.data_prep.io import read_user_table

__all__ = ["read_experiments", "check_experiments", "MEASURES", "EXPERIMENT_COLUMNS", "TESTS_COLUMNS"]

#: What a test's estimate measures: the effect on everyone assigned to see ads, or on the exposed.
MEASURES = ("assigned", "exposed")
#: The columns of a tests file (the last two optional).
EXPERIMENT_COLUMNS = ("campaign", "estimate", "std_error", "measures", "exposed_share", "test")
#: The converted table that crosses into the model: one row per test, in liftpool's estimand.
TESTS_COLUMNS = ("test", "campaign", "measures", "estimate", "std_error", "exposed_share", "lift", "lift_se",
                 "log_lift", "log_lift_se")


def _bad(df: pd.DataFrame, mask: np.ndarray, col: str, label: str, problem: str, fix: str, shown=None) -> None:
    idx = np.flatnonzero(mask)
    if idx.size:
        vals = shown if shown is not None else df[col]
        raise InputError(problem=f"{idx.size} row(s): {problem}", file=label, column=col,
                         rows=[BadRow(int(i) + 1, repr(vals.iloc[i]) if hasattr(vals, "iloc") else str(vals[i]))
                               for i in idx[:5]], n_bad=int(idx.size), fix=fix)


def read_experiments(path: str | Path, campaigns: list[str] | None = None) -> pd.DataFrame:
    """Read and convert a tests file (CSV or Parquet); see :func:`check_experiments`."""
    table = read_user_table(path, "randomized tests file", "campaign,estimate,std_error,measures,exposed_share")
    return check_experiments(table, str(Path(path)), campaigns)


def check_experiments(df: pd.DataFrame, label: str = "randomized tests", campaigns: list[str] | None = None
                      ) -> pd.DataFrame:
    """Validate a tests table and convert every test to the lift among exposed users.

    Parameters
    ----------
    df : DataFrame
        ``campaign, estimate, std_error, measures[, exposed_share][, test]``.  ``estimate`` is a
        relative lift (0.05 is +5%), ``std_error`` its standard error; ``measures`` is
        ``"assigned"`` (test group against control group, everyone assigned: ``exposed_share``
        required, the share of the test group that saw an ad) or ``"exposed"`` (already the effect
        among the exposed).
    label : str
        The file name used in messages.
    campaigns : list of str, optional
        The campaigns of the counts; a test of any other campaign is refused.

    Returns
    -------
    DataFrame
        :data:`TESTS_COLUMNS`: the input, ``lift, lift_se`` (among the exposed) and ``log_lift,
        log_lift_se`` (the model's scale).
    """
    if len(df) == 0:
        raise InputError(problem="the file has no tests", file=label,
                         fix="give one row per randomized test, or leave the tests file out")
    for col in ("campaign", "estimate", "std_error", "measures"):
        if col not in df.columns:
            raise InputError(problem=f"required column is missing (the file has: {', '.join(map(str, df.columns))})",
                             file=label, column=col,
                             fix="give campaign, estimate, std_error, measures and, for measures 'assigned', exposed_share")
    unknown = [c for c in df.columns if c not in EXPERIMENT_COLUMNS]
    if unknown:
        raise InputError(problem=f"unknown column(s) {', '.join(map(repr, unknown))}; the columns are "
                                 f"{', '.join(EXPERIMENT_COLUMNS)}", file=label, column=str(unknown[0]),
                         fix="rename or remove the column")
    df = df.reset_index(drop=True).copy()
    camp = df["campaign"].astype("string").str.strip()
    _bad(df, (camp.isna() | (camp == "")).to_numpy(), "campaign", label, "no campaign name", "name the tested campaign")
    df["campaign"] = camp.astype(str)
    if campaigns is not None:
        _bad(df, ~df["campaign"].isin(campaigns).to_numpy(), "campaign", label,
             "campaign not in the counts (a test can only calibrate a campaign the model sees)",
             f"use one of the counts' campaigns: {', '.join(campaigns[:8])}{' ...' if len(campaigns) > 8 else ''}")
    meas = df["measures"].astype("string").str.strip().str.lower()
    _bad(df, ~meas.isin(MEASURES).fillna(False).to_numpy(), "measures", label,
         f"not one of {', '.join(map(repr, MEASURES))}",
         "'assigned': the effect on everyone assigned to the test group; 'exposed': on those who saw an ad")
    df["measures"] = meas.astype(str)
    for col in ("estimate", "std_error"):
        v = pd.to_numeric(df[col], errors="coerce")
        _bad(df, (~np.isfinite(v.to_numpy(dtype=float))), col, label, "not a finite number",
             f"write {col} as a plain number (a relative lift: 0.05 for +5%)")
        df[col] = v.astype(float)
    _bad(df, (df["std_error"] <= 0).to_numpy(), "std_error", label, "the standard error must be above 0",
         "give the test's standard error of its relative lift")
    assigned = (df["measures"] == "assigned").to_numpy()
    if "exposed_share" in df.columns:
        share = pd.to_numeric(df["exposed_share"], errors="coerce").astype(float)
    else:
        share = pd.Series(np.nan, index=df.index)
    bad_share = assigned & ~((share > 0) & (share <= 1)).to_numpy()
    _bad(df, bad_share, "exposed_share", label,
         "a test of everyone assigned needs the share of its test group that saw an ad, above 0 and at most 1",
         "give exposed_share (e.g. 0.62), or measures 'exposed' if the estimate is already among the exposed",
         shown=share if "exposed_share" in df.columns else pd.Series(["(missing)"] * len(df)))
    share = np.where(assigned, share.to_numpy(), 1.0)
    lift = df["estimate"].to_numpy() / share
    lift_se = df["std_error"].to_numpy() / share
    _bad(df, lift <= -1.0, "estimate", label,
         "converted to the exposed users, the lift is -100% or below, which no effect can be "
         "(assigned estimate / exposed share)",
         "check the estimate, its units (0.05 for +5%) and the exposed share",
         shown=pd.Series([f"{e!r} / {s:.3g} = {lft:.3g}" for e, s, lft in zip(df["estimate"], share, lift, strict=True)]))
    if "test" in df.columns:
        name = df["test"].astype("string").fillna("").str.strip()
    else:
        name = pd.Series([""] * len(df))
    n = df.groupby("campaign").cumcount() + 1
    df["test"] = [t if t else f"{c} test {k}" for t, c, k in zip(name, df["campaign"], n, strict=True)]
    _bad(df, df["test"].duplicated(keep=False).to_numpy(), "test", label, "the same test name on more than one row",
         "give each test its own name")
    df["exposed_share"] = share
    df["lift"] = lift
    df["lift_se"] = lift_se
    df["log_lift"] = np.log1p(lift)
    df["log_lift_se"] = lift_se / (1.0 + lift)
    return df[list(TESTS_COLUMNS)]
