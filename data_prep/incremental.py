"""Re-counting when placebo outcomes are added: only the new outcomes' conversions are read.

``prepare_counts(..., cache=DIR)`` keeps the exposure cells and the raw cell counts.
:func:`add_outcomes` counts the new (campaign, outcome) pairs against those cells,
appends them to the raw counts and re-applies the shared cell rules, so the result
equals a preparation from scratch with the new outcomes and conversions included.
"""

from __future__ import annotations

import difflib
import json
import os
import shutil
from pathlib import Path

import pandas as pd

from liftpool.data_prep.cells import UNEXPOSED_CELL
from liftpool.data_prep.counts import finalize
from liftpool.data_prep.engine_sql import conversion_pairs
from liftpool.data_prep.errors import BadRow, InputError
from liftpool.data_prep.prepare import PrepResult
from liftpool.data_prep.raw import RawCounts
from liftpool.data_prep.rules import CountingRules
from liftpool.data_prep.sources import SPECS, _load, _require_columns, _typed_view, connect

__all__ = ["add_outcomes", "check_new_outcomes", "CACHE_FILES"]

CACHE_FILES = ("cells.parquet", "served.parquet", "campaign_start.parquet", "raw_users.parquet",
               "raw_conversions.parquet", "raw_windows.parquet", "raw_campaigns.parquet", "raw_totals.json")


def check_new_outcomes(existing: pd.DataFrame, new: pd.DataFrame, label: str) -> pd.DataFrame:
    """New placebo rows: known campaigns, role placebo, not already listed, not a campaign's target."""
    for col in ("campaign", "outcome", "role"):
        if col not in new.columns:
            raise InputError(problem=f"required column is missing (the file has: {', '.join(map(str, new.columns))})",
                             file=label, column=col, fix="give campaign, outcome, role")
    new = new[["campaign", "outcome", "role"]].astype(str).reset_index(drop=True)
    new["role"] = new["role"].str.strip().str.lower()

    def rows(mask):
        return [BadRow(int(i) + 1, f"{new.campaign[i]!r}, {new.outcome[i]!r}, {new.role[i]!r}")
                for i in mask[mask].index[:5]]

    bad = new["role"] != "placebo"
    if bad.any():
        raise InputError(problem="only placebo outcomes can be added this way", file=label, column="role",
                         rows=rows(bad), fix="set role to placebo; a campaign's target is set when the workspace is made")
    unknown = ~new["campaign"].isin(existing["campaign"])
    if unknown.any():
        raise InputError(problem="campaign(s) not in the workspace", file=label, column="campaign", rows=rows(unknown),
                         fix="check the campaign names match the impressions")
    key = new["campaign"] + "\x00" + new["outcome"]
    old = set(existing["campaign"] + "\x00" + existing["outcome"])
    dup = key.isin(old) | key.duplicated(keep=False)
    if dup.any():
        raise InputError(problem="outcome(s) already listed for the campaign (as its target or a placebo)",
                         file=label, column="outcome", rows=rows(dup),
                         fix="add only outcomes the campaign does not list yet; a placebo must differ from the target")
    return new


def add_outcomes(
    cache: str | os.PathLike,
    new_cache: str | os.PathLike,
    outcomes: pd.DataFrame,
    new_pairs: pd.DataFrame,
    conversions,
    rules: CountingRules,
) -> tuple[PrepResult, int]:
    """Count new (campaign, outcome) pairs from the cached cells; return the full result and the rows read.

    Parameters
    ----------
    cache : folder written by ``prepare_counts(..., cache=...)``
    new_cache : folder to write the updated cache into (must not exist)
    outcomes : DataFrame
        All outcome rows, old and new.
    new_pairs : DataFrame
        The new rows (checked by :func:`check_new_outcomes`).
    conversions : path, list of paths or DataFrame
        Where the new outcomes' conversions are; only their rows are read into the count.
    rules : CountingRules
        The rules the cache was made with.
    """
    cache, new_cache = Path(cache), Path(new_cache)
    con = connect()
    cells = str(cache / "cells.parquet").replace("'", "''")
    con.execute(f"CREATE VIEW _cells AS SELECT * FROM read_parquet('{cells}')").fetchall()
    id_type = "BIGINT" if "INT" in str(con.execute("DESCRIBE _cells").fetchall()[0][1]).upper() else "VARCHAR"
    t = _load(con, "conversions", conversions)
    _require_columns(t, list(SPECS["conversions"]))
    _typed_view(con, t, list(SPECS["conversions"]), id_type)
    con.register("_new_pairs", new_pairs[["campaign", "outcome"]])
    con.execute("CREATE VIEW t_outcomes AS SELECT * FROM _new_pairs").fetchall()
    # only the new outcomes' rows take part; a new outcome without any is a wrong name or file
    have = dict(con.execute("SELECT outcome, count(*) FROM t_conversions GROUP BY outcome").fetchall())
    empty = [o for o in new_pairs["outcome"].drop_duplicates() if o not in have]
    if empty:
        close = difflib.get_close_matches(empty[0], [str(o) for o in have], n=3, cutoff=0.6)
        raise InputError(
            problem=f"new outcome '{empty[0]}' has no conversion rows in {t.label}"
                    + (f" (close names there: {', '.join(repr(c) for c in close)})" if close else ""),
            file=t.label, column="outcome",
            fix="check the outcome's spelling against the conversions file, or pass the conversions file "
                "that holds it with --conversions; a placebo without conversions adds nothing")
    con.execute("CREATE OR REPLACE VIEW t_conversions_new AS SELECT * FROM t_conversions "
                "WHERE outcome IN (SELECT outcome FROM t_outcomes)").fetchall()
    rows_read = int(con.execute("SELECT count(*) FROM t_conversions_new").fetchall()[0][0])
    con.execute("CREATE OR REPLACE TABLE _conv_new AS SELECT * FROM t_conversions_new").fetchall()
    con.execute("CREATE OR REPLACE VIEW t_conversions AS SELECT * FROM _conv_new").fetchall()
    pairs = conversion_pairs(con, "_cells", ["campaign", "arm", "cell"], rules.window_seconds)
    raw = RawCounts(users=pd.read_parquet(cache / "raw_users.parquet"),
                    conversions=pd.read_parquet(cache / "raw_conversions.parquet"),
                    windows=pd.read_parquet(cache / "raw_windows.parquet"),
                    campaigns=pd.read_parquet(cache / "raw_campaigns.parquet"),
                    totals=json.loads((cache / "raw_totals.json").read_text()))
    new_conv = pairs[pairs["conversions"] > 0][["campaign", "cell", "arm", "outcome", "conversions"]]
    new_win = pairs.groupby(["campaign", "outcome"], as_index=False)[
        ["before_first_serve", "in_window", "after_window"]].sum()
    if rules.unexposed and (cache / "users.parquet").exists():
        new_conv = pd.concat([new_conv, _unexposed_new(con, cache, rules)], ignore_index=True)
    raw.conversions = pd.concat([raw.conversions, new_conv], ignore_index=True)
    raw.windows = pd.concat([raw.windows, new_win], ignore_index=True)
    counts, summary = finalize(raw, outcomes, rules)
    new_cache.mkdir(parents=True)
    for name in ("cells.parquet", "served.parquet", "campaign_start.parquet", "users.parquet"):
        if (cache / name).exists():
            try:
                os.link(cache / name, new_cache / name)
            except OSError:
                shutil.copy2(cache / name, new_cache / name)
    for name in ("users", "conversions", "windows", "campaigns"):
        getattr(raw, name).to_parquet(new_cache / f"raw_{name}.parquet", index=False)
    (new_cache / "raw_totals.json").write_text(json.dumps(raw.totals))
    return PrepResult(counts=counts, summary=summary, rules=rules), rows_read


def _unexposed_new(con, cache: Path, rules: CountingRules) -> pd.DataFrame:
    q = {n: str(cache / f"{n}.parquet").replace("'", "''") for n in ("served", "campaign_start", "users")}
    w = rules.window_seconds
    df = con.execute(f"""
        SELECT s.campaign, '{UNEXPOSED_CELL}' AS cell, 'unexposed' AS arm, o.outcome,
               count(DISTINCT cv.user_id) AS conversions
        FROM read_parquet('{q["campaign_start"]}') s
        JOIN t_outcomes o ON o.campaign = s.campaign
        JOIN t_conversions cv ON cv.outcome = o.outcome
             AND cv.converted_at > s.t0 AND cv.converted_at <= s.t0 + INTERVAL {w} SECOND
        SEMI JOIN read_parquet('{q["users"]}') u ON u.user_id = cv.user_id
        ANTI JOIN read_parquet('{q["served"]}') x ON x.user_id = cv.user_id AND x.campaign = s.campaign
        GROUP BY s.campaign, o.outcome
    """).df()
    return df[df["conversions"] > 0]
