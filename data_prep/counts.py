"""The counts table: the only thing that crosses from data preparation to the models.

``campaign, cell, arm, outcome, role, users, conversions``, one row per
(campaign, cell, arm, outcome); ``arm`` is ``seen``, ``unseen`` or (optional)
``unexposed``.  This module applies the cell rules shared by both engines
(:func:`finalize`), validates counts tables that come from elsewhere
(:func:`validate_counts`, :func:`read_counts`) and gives the xarray view
(:func:`to_dataset`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from liftpool.data_prep.cells import MERGED_CELL, SEPARATOR
from liftpool.data_prep.errors import BadRow, InputError
from liftpool.data_prep.raw import RawCounts
from liftpool.data_prep.rules import CountingRules

__all__ = [
    "COUNTS_COLUMNS",
    "ARMS",
    "RESERVED_CAMPAIGNS",
    "ROLES",
    "PrepSummary",
    "finalize",
    "validate_counts",
    "read_counts",
    "to_dataset",
    "drop_one_arm_cells",
]

COUNTS_COLUMNS = ["campaign", "cell", "arm", "outcome", "role", "users", "conversions"]
ARMS = ("seen", "unseen", "unexposed")
#: The largest users or conversions count of one row: ten billion (more than the world's population;
#: beyond it a value is an export error, and 64-bit sums stay exact).
MAX_COUNT = 1e10
#: Campaign names the reports use for their pooled rows (models/summary.py takes them from here).
RESERVED_CAMPAIGNS = ("(portfolio)", "(new campaign)")
ROLES = ("target", "placebo")
_KEYS = ["campaign", "cell", "arm", "outcome"]


@dataclass
class PrepSummary:
    """What data preparation did, for the analyst and the report appendix.

    Attributes
    ----------
    campaigns : DataFrame
        One row per campaign: impressions, non-viewable share, users seen and
        unseen, users removed by each rule, cells, target conversions.
    windows : DataFrame
        Conversion events of exposed users per (campaign, outcome): before or at
        the first serve, inside the window, after it (only the inside ones count).
    totals : dict
        Whole-input tallies.
    rules : dict
        The counting rules used.
    warnings : list of str
        What is valid but probably not what the analyst meant (``Inputs.warnings``), shown first.
    """

    campaigns: pd.DataFrame
    windows: pd.DataFrame = field(default_factory=pd.DataFrame)
    totals: dict = field(default_factory=dict)
    rules: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "totals": {k: (int(v) if isinstance(v, (int, np.integer)) else v) for k, v in self.totals.items()},
            "rules": self.rules,
            "warnings": list(self.warnings),
            "campaigns": self.campaigns.to_dict(orient="records"),
            "windows": self.windows.to_dict(orient="records"),
        }

    @classmethod
    def from_dict(cls, d: dict) -> PrepSummary:
        return cls(campaigns=pd.DataFrame(d.get("campaigns", [])), windows=pd.DataFrame(d.get("windows", [])),
                   totals=dict(d.get("totals", {})), rules=dict(d.get("rules", {})),
                   warnings=[str(w) for w in d.get("warnings", [])])

    def render(self) -> str:
        """Plain-text summary for the terminal."""
        t = self.totals
        lines = ["Data preparation summary"] + [f"  WARNING: {w}" for w in self.warnings]
        if "impression_rows" in t:
            lines.append(f"  impressions read: {t['impression_rows']:,}; conversions read: {t['conversion_rows']:,}"
                         f" ({t.get('conversion_rows_unknown_outcome', 0):,} for outcomes no campaign lists, ignored)")
        for key, text in (("users_unmeasured_only", "left out: served only unmeasured impressions"),
                          ("users_one_arm_cells", "removed: cells lacking a seen or an unseen user"),
                          ("users_small_cells_dropped", "removed: small cells dropped"),
                          ("users_small_cells_merged", "kept: users in small cells merged into a remainder"),
                          ("users_without_covariates", "kept with covariate 'missing': not in the users table")):
            if key in t:
                lines.append(f"  {text}: {t[key]:,} user-campaign pairs")
        if len(self.windows):
            w = self.windows[["before_first_serve", "in_window", "after_window"]].sum()
            lines.append(f"  conversion events of exposed users: {int(w['in_window']):,} in the window, "
                         f"{int(w['before_first_serve']):,} at or before the first serve and "
                         f"{int(w['after_window']):,} after the window (ignored)")
        c = self.campaigns
        if len(c):
            lines.append("")
            cols = ["campaign", "users_seen", "users_unseen", "cells", "target_conversions_seen",
                    "target_conversions_unseen", "nonviewable_share"]
            show = c[[x for x in cols if x in c.columns]].copy()
            if "nonviewable_share" in show:
                show["nonviewable_share"] = show["nonviewable_share"].map(lambda v: f"{v:.1%}")
            lines.append(show.to_string(index=False))
        return "\n".join(lines)


def _pivot_arms(users: pd.DataFrame) -> pd.DataFrame:
    ex = users[users["arm"].isin(["seen", "unseen"])]
    if ex.empty:
        return pd.DataFrame({"campaign": pd.Series(dtype=object), "cell": pd.Series(dtype=object),
                             "seen": pd.Series(dtype="int64"), "unseen": pd.Series(dtype="int64")})
    p = ex.pivot_table(index=["campaign", "cell"], columns="arm", values="users", aggfunc="sum", fill_value=0)
    for a in ("seen", "unseen"):
        if a not in p.columns:
            p[a] = 0
    return p[["seen", "unseen"]].reset_index()


def finalize(raw: RawCounts, outcomes: pd.DataFrame, rules: CountingRules) -> tuple[pd.DataFrame, PrepSummary]:
    """Apply the cell rules and assemble the counts table and the prep summary.

    Cells lacking a seen or an unseen user are dropped.  Cells with fewer
    than ``rules.min_cell_users`` users in an arm are merged into one remainder
    cell per campaign (kept when it has both arms) or dropped, per
    ``rules.small_cells``.

    Parameters
    ----------
    raw : RawCounts
        An engine's output.
    outcomes : DataFrame
        ``campaign, outcome, role``.
    rules : CountingRules
    """
    p = _pivot_arms(raw.users)
    p["one_arm"] = (p["seen"] == 0) | (p["unseen"] == 0)
    p["small"] = ~p["one_arm"] & (np.minimum(p["seen"], p["unseen"]) < rules.min_cell_users)
    p["total"] = p["seen"] + p["unseen"]
    p["new_cell"] = p["cell"].astype(object)
    p.loc[p["one_arm"], "new_cell"] = None
    if rules.small_cells == "drop":
        p.loc[p["small"], "new_cell"] = None
        merged_users = pd.Series(dtype="int64")
    else:
        p.loc[p["small"], "new_cell"] = MERGED_CELL
        merged = p[p["small"]].groupby("campaign")[["seen", "unseen"]].sum()
        bad = merged[(merged["seen"] == 0) | (merged["unseen"] == 0)].index
        p.loc[p["small"] & p["campaign"].isin(bad), "new_cell"] = None
        merged_users = p[p["small"] & ~p["campaign"].isin(bad)].groupby("campaign")["total"].sum()

    mapping = p[["campaign", "cell", "new_cell"]]
    un = raw.users[raw.users["arm"] == "unexposed"]

    def remap(df: pd.DataFrame, value: str, keys: list[str]) -> pd.DataFrame:
        ex = df[df["arm"].isin(["seen", "unseen"])].merge(mapping, on=["campaign", "cell"], how="inner")
        ex = ex[ex["new_cell"].notna()].assign(cell=lambda d: d["new_cell"]).drop(columns="new_cell")
        return ex.groupby(keys, as_index=False)[value].sum()

    users = remap(raw.users, "users", ["campaign", "cell", "arm"])
    users = pd.concat([users, un[["campaign", "cell", "arm", "users"]]], ignore_index=True)
    conv = remap(raw.conversions, "conversions", _KEYS)
    conv = pd.concat([conv, raw.conversions[raw.conversions["arm"] == "unexposed"][_KEYS + ["conversions"]]],
                     ignore_index=True)

    roles = outcomes[["campaign", "outcome", "role"]].drop_duplicates()
    grid = users.merge(roles, on="campaign", how="inner")
    counts = grid.merge(conv, on=_KEYS, how="left")
    counts["conversions"] = counts["conversions"].fillna(0).astype("int64")
    counts["users"] = counts["users"].astype("int64")
    counts = counts[COUNTS_COLUMNS].sort_values(_KEYS).reset_index(drop=True)
    for c in ("campaign", "cell", "arm", "outcome", "role"):
        counts[c] = counts[c].astype(str)

    summary = _summary(raw, p, merged_users, counts, roles, rules)
    return counts, summary


def _summary(raw: RawCounts, p: pd.DataFrame, merged_users: pd.Series, counts: pd.DataFrame,
             roles: pd.DataFrame, rules: CountingRules) -> PrepSummary:
    camp = raw.campaigns.set_index("campaign").copy()
    camp["users_one_arm_cells"] = p[p["one_arm"]].groupby("campaign")["total"].sum()
    dropped_small = p[p["small"] & p["new_cell"].isna()].groupby("campaign")["total"].sum()
    camp["users_small_cells_dropped"] = dropped_small
    camp["users_small_cells_merged"] = merged_users
    kept = counts[counts["arm"] != "unexposed"].drop_duplicates(["campaign", "cell", "arm"])
    u = kept.pivot_table(index="campaign", columns="arm", values="users", aggfunc="sum", fill_value=0)
    camp["users_seen"] = u.get("seen")
    camp["users_unseen"] = u.get("unseen")
    camp["cells"] = kept.groupby("campaign")["cell"].nunique()
    tgt = counts[(counts["role"] == "target") & (counts["arm"] != "unexposed")]
    tc = tgt.pivot_table(index="campaign", columns="arm", values="conversions", aggfunc="sum", fill_value=0)
    camp["target_conversions_seen"] = tc.get("seen")
    camp["target_conversions_unseen"] = tc.get("unseen")
    camp["target"] = roles[roles["role"] == "target"].set_index("campaign")["outcome"]
    camp["placebos"] = roles[roles["role"] == "placebo"].groupby("campaign").size()
    camp = camp.fillna(0)
    for c in camp.columns:
        if c != "target":
            camp[c] = camp[c].astype("int64")
    m = camp["measured_impressions"].replace(0, np.nan)
    camp["nonviewable_share"] = ((camp["measured_impressions"] - camp["viewable_impressions"]) / m).fillna(0.0)
    camp = camp.reset_index()
    totals = dict(raw.totals)
    for key in ("users_unmeasured_only", "users_without_covariates", "users_one_arm_cells",
                "users_small_cells_dropped", "users_small_cells_merged"):
        totals[key] = int(camp[key].sum())
    totals["impressions_measured"] = int(camp["measured_impressions"].sum())
    totals["impressions_viewable"] = int(camp["viewable_impressions"].sum())
    return PrepSummary(campaigns=camp, windows=raw.windows.reset_index(drop=True), totals=totals,
                       rules=rules.to_dict())


def drop_one_arm_cells(counts: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Drop (campaign, cell) pairs lacking a seen or an unseen user; return kept rows and what was dropped."""
    ex = counts[counts["arm"].isin(["seen", "unseen"])]
    users = ex.groupby(["campaign", "cell", "arm"])["users"].max().unstack("arm").reindex(
        columns=["seen", "unseen"]).fillna(0)
    bad = users[(users["seen"] <= 0) | (users["unseen"] <= 0)].reset_index()[["campaign", "cell"]]
    if bad.empty:
        return counts, bad
    key = counts.set_index(["campaign", "cell"]).index
    drop = key.isin(pd.MultiIndex.from_frame(bad)) & counts["arm"].isin(["seen", "unseen"]).to_numpy()
    return counts[~drop].reset_index(drop=True), bad


def validate_counts(df: pd.DataFrame, label: str = "counts table") -> pd.DataFrame:
    """Check a counts table's invariants; return it normalized (typed, sorted, ``cell`` built).

    A table without a ``cell`` column has its non-standard columns taken as
    covariates and a cell label built from them.

    Raises
    ------
    InputError
        Missing columns, bad arms or roles, negative or non-integer counts,
        conversions above users, duplicate rows, a campaign without exactly one
        target, an outcome whose role differs between rows.
    """
    if len(df) == 0:
        raise InputError(problem="the counts table has no rows", file=label,
                         fix="prepare counts from logs with 'liftpool prepare', or export them again")
    required = ["campaign", "arm", "outcome", "role", "users", "conversions"]
    for col in required:
        if col not in df.columns:
            raise InputError(problem=f"required column is missing (the table has: {', '.join(map(str, df.columns))})",
                             file=label, column=col, fix=f"add a column '{col}' (see docs/data-format.md)")
    df = df.copy().reset_index(drop=True)
    if "cell" not in df.columns:
        covs = [c for c in df.columns if c not in required]
        if covs:
            df["cell"] = [SEPARATOR.join(f"{c}={v}" for c, v in zip(covs, row, strict=True))
                          for row in df[covs].astype(str).itertuples(index=False)]
        else:
            df["cell"] = "all"

    def bad_rows(mask: np.ndarray, col: str) -> list[BadRow]:
        idx = np.flatnonzero(mask)[:5]
        return [BadRow(int(i) + 1, "empty" if pd.isna(df[col].iloc[i]) else repr(df[col].iloc[i])) for i in idx]

    for col in ("campaign", "cell", "arm", "outcome", "role"):
        empty = df[col].isna().to_numpy() | (df[col].astype(str).str.strip() == "").to_numpy()
        if empty.any():
            raise InputError(problem=f"{int(empty.sum())} empty value(s)", file=label, column=col,
                             rows=bad_rows(empty, col), n_bad=int(empty.sum()), fix=f"every row needs a {col}")
        df[col] = df[col].astype(str)
    for col, valid in (("arm", ARMS), ("role", ROLES)):
        df[col] = df[col].str.strip().str.lower()
        bad = ~df[col].isin(valid).to_numpy()
        if bad.any():
            raise InputError(problem=f"{int(bad.sum())} value(s) are not one of {', '.join(valid)}", file=label,
                             column=col, rows=bad_rows(bad, col), n_bad=int(bad.sum()),
                             fix=f"set {col} to one of: {', '.join(valid)}")
    for col in ("users", "conversions"):
        num = pd.to_numeric(df[col], errors="coerce")
        bad = num.isna().to_numpy() | ~np.isfinite(num.to_numpy(dtype=float, na_value=np.nan))
        if bad.any():
            raise InputError(problem=f"{int(bad.sum())} value(s) are not numbers", file=label, column=col,
                             rows=bad_rows(bad, col), n_bad=int(bad.sum()), fix=f"write {col} as a whole number")
        v = num.to_numpy(dtype=float)
        neg = v < 0
        if neg.any():
            raise InputError(problem=f"{int(neg.sum())} negative count(s)", file=label, column=col,
                             rows=bad_rows(neg, col), n_bad=int(neg.sum()), fix=f"{col} cannot be negative")
        frac = v != np.round(v)
        if frac.any():
            raise InputError(problem=f"{int(frac.sum())} value(s) are not whole numbers", file=label, column=col,
                             rows=bad_rows(frac, col), n_bad=int(frac.sum()),
                             fix=f"{col} counts users: write whole numbers")
        huge = v > MAX_COUNT
        if huge.any():
            raise InputError(problem=f"{int(huge.sum())} value(s) above {MAX_COUNT:,.0f}, more than any audience",
                             file=label, column=col, rows=bad_rows(huge, col), n_bad=int(huge.sum()),
                             fix=f"check the {col} column (a unit or an export error)")
        df[col] = v.astype("int64")
    over = (df["conversions"] > df["users"]).to_numpy()
    if over.any():
        idx = np.flatnonzero(over)[:5]
        raise InputError(
            problem=f"{int(over.sum())} row(s) have more conversions than users", file=label, column="conversions",
            rows=[BadRow(int(i) + 1, f"users {df['users'].iloc[i]}, conversions {df['conversions'].iloc[i]}")
                  for i in idx], n_bad=int(over.sum()),
            fix="conversions counts users who converted at least once, so it cannot exceed users")
    dup = df.duplicated(_KEYS, keep=False).to_numpy()
    if dup.any():
        idx = np.flatnonzero(dup)[:5]
        raise InputError(
            problem=f"{int(dup.sum())} rows repeat a (campaign, cell, arm, outcome)", file=label,
            column="campaign, cell, arm, outcome", n_bad=int(dup.sum()),
            rows=[BadRow(int(i) + 1, ", ".join(repr(df[k].iloc[i]) for k in _KEYS)) for i in idx],
            fix="keep one row per campaign, cell, arm and outcome (sum duplicates first)")
    roles = df.groupby(["campaign", "outcome"])["role"].nunique()
    if (roles > 1).any():
        c, o = roles[roles > 1].index[0]
        mask = ((df["campaign"] == c) & (df["outcome"] == o)).to_numpy()
        raise InputError(problem=f"outcome '{o}' of campaign '{c}' is both target and placebo", file=label,
                         column="role", rows=bad_rows(mask, "role"),
                         fix="a campaign's placebo outcomes must differ from its target")
    targets = df[df["role"] == "target"].groupby("campaign")["outcome"].nunique()
    for c in df["campaign"].unique():
        n = int(targets.get(c, 0))
        if n != 1:
            mask = ((df["campaign"] == c) & (df["role"] == "target")).to_numpy() if n else (df["campaign"] == c).to_numpy()
            raise InputError(problem=f"campaign '{c}' has {n} target outcomes", file=label, column="role",
                             rows=bad_rows(mask, "outcome"), fix="give each campaign exactly one target outcome")
    # a table without a single target conversion measures nothing
    tgt_conv = df.loc[df["role"] == "target", "conversions"].sum()
    if tgt_conv == 0:
        raise InputError(problem="the table has no target conversions at all (every target row has 0)",
                         file=label, column="conversions",
                         fix="check the conversion window and the target outcome names; a lift cannot be "
                             "measured without conversions")
    # names the reports use for their pooled rows cannot be campaigns
    reserved = df["campaign"].isin(RESERVED_CAMPAIGNS).to_numpy()
    if reserved.any():
        raise InputError(problem=f"{int(reserved.sum())} row(s) use a reserved campaign name "
                                 f"({', '.join(RESERVED_CAMPAIGNS)}: the report's pooled rows)",
                         file=label, column="campaign", rows=bad_rows(reserved, "campaign"), n_bad=int(reserved.sum()),
                         fix="rename the campaign")
    # every campaign's target needs users in both the seen and the unseen arm (the comparison itself)
    tgt = df[(df["role"] == "target") & df["arm"].isin(["seen", "unseen"])]
    have = tgt[tgt["users"] > 0].groupby("campaign")["arm"].agg(lambda a: set(a))
    for c in df["campaign"].unique():
        missing = sorted({"seen", "unseen"} - have.get(c, set()))
        if missing:
            mask = ((df["campaign"] == c) & (df["role"] == "target")).to_numpy()
            raise InputError(problem=f"campaign '{c}' has no {' and no '.join(missing)} users for its target outcome",
                             file=label, column="arm", rows=bad_rows(mask, "arm"),
                             fix="each campaign needs target rows for seen and for unseen users (the unexposed arm "
                                 "alone is not a comparison); drop the campaign or add its rows")
    return df[COUNTS_COLUMNS].sort_values(_KEYS).reset_index(drop=True)


def read_counts(path: str | os.PathLike) -> pd.DataFrame:
    """Read and validate a counts file (CSV or Parquet by extension)."""
    from liftpool.data_prep.sources import file_format

    path = Path(path)
    fmt = file_format(path)
    if not path.is_file():
        raise InputError(problem="file not found", file=str(path), fix="check the path and the file name")
    if path.stat().st_size == 0:
        raise InputError(problem="the file is empty", file=str(path), fix="export the counts table again")
    try:
        df = (pd.read_parquet(path) if fmt == "parquet"
              else pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={"cell": str}))
    except Exception as exc:  # noqa: BLE001 - any reader failure is bad input
        raise InputError(problem=f"cannot read the file: {str(exc).splitlines()[0]}", file=str(path),
                         fix=f"check that it is a valid {fmt.upper()} file") from None
    return validate_counts(df, str(path))


def to_dataset(counts: pd.DataFrame) -> xr.Dataset:
    """The counts table as an xarray Dataset with dimensions (campaign, cell, arm, outcome).

    ``users`` and ``conversions`` are float with NaN where the combination
    does not exist (cells and outcomes differ between campaigns); ``role`` is
    indexed by (campaign, outcome), empty where the outcome is not the
    campaign's.
    """
    idx = counts.set_index(_KEYS)
    ds = xr.Dataset.from_dataframe(idx[["users", "conversions"]].astype(float))
    role = counts.drop_duplicates(["campaign", "outcome"]).set_index(["campaign", "outcome"])["role"]
    role_da = xr.DataArray.from_series(role).reindex(campaign=ds.campaign, outcome=ds.outcome).fillna("")
    ds["role"] = role_da.astype(str)
    ds.attrs["description"] = "liftpool seen/unseen counts"
    return ds
