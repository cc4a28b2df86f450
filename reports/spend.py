"""Reading and checking a spend file for the report."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from liftpool.data_prep.errors import BadRow, InputError
from liftpool.data_prep.io import read_user_table

__all__ = ["read_spend", "check_spend"]


def read_spend(path) -> pd.DataFrame:
    table = read_user_table(path, "spend file", "campaign,spend[,value_per_conversion]")
    return check_spend(table, str(Path(path)))


def check_spend(df: pd.DataFrame, label: str, campaigns: list[str] | None = None) -> pd.DataFrame:
    """``campaign, spend[, value_per_conversion]``: numbers >= 0, one row per campaign, known campaigns."""
    for col in ("campaign", "spend"):
        if col not in df.columns:
            raise InputError(problem=f"required column is missing (the file has: {', '.join(map(str, df.columns))})",
                             file=label, column=col, fix="give campaign, spend and optionally value_per_conversion")
    df = df.copy()
    df["campaign"] = df["campaign"].astype(str)
    for col in ("spend", "value_per_conversion"):
        if col not in df.columns:
            continue
        v = pd.to_numeric(df[col], errors="coerce")
        bad = (v.isna() & df[col].notna()) | (v < 0) | (col == "spend") & v.isna() | np.isinf(v)
        if bad.any():
            idx = np.flatnonzero(bad.to_numpy())
            raise InputError(problem=f"{len(idx)} value(s) are not finite non-negative numbers", file=label, column=col,
                             rows=[BadRow(int(i) + 1, repr(df[col].iloc[i])) for i in idx[:5]], n_bad=len(idx),
                             fix=f"write {col} as a plain finite number >= 0")
        df[col] = v
    dup = df["campaign"].duplicated(keep=False).to_numpy()
    if dup.any():
        idx = np.flatnonzero(dup)
        raise InputError(problem="a campaign appears on more than one row", file=label, column="campaign",
                         rows=[BadRow(int(i) + 1, repr(df['campaign'].iloc[i])) for i in idx[:5]],
                         fix="keep one spend row per campaign")
    if campaigns is not None:
        unknown = df[~df["campaign"].isin(campaigns)]
        if len(unknown):
            raise InputError(problem=f"{len(unknown)} campaign(s) are not in the fit", file=label, column="campaign",
                             rows=[BadRow(int(i) + 1, repr(c)) for i, c in zip(unknown.index[:5], unknown.campaign,
                                                                               strict=False)],
                             fix="check the campaign names match the counts the model was fitted on")
    return df
