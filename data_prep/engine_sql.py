"""The SQL counting engine (DuckDB): out of core, never loads the impression log into pandas.

The rules are written once as SQL text built from the same
:class:`~liftpool.data_prep.cells.CellSpec` and viewability expressions that
the pandas engine applies in NumPy.  The exposure table (one row per user and
campaign) is the only intermediate: it is kept as a DuckDB table so a later
re-count with new outcomes does not read the impressions again.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from liftpool.data_prep.cells import UNEXPOSED_CELL, cell_spec, label_cells
from liftpool.data_prep.raw import RawCounts
from liftpool.data_prep.rules import FREQUENCY, VIEW_HISTORY, CountingRules
from liftpool.data_prep.sources import Inputs
from liftpool.data_prep.viewability import sql_measured, sql_viewable

__all__ = ["build_exposures", "count_sql", "conversion_pairs", "save_cache", "EXPOSURES_TABLE"]

EXPOSURES_TABLE = "exposures"


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def build_exposures(inputs: Inputs, rules: CountingRules, table: str = EXPOSURES_TABLE) -> None:
    """One scan of the impressions into ``table``: one row per (user, campaign).

    Columns: ``user_id, campaign, first_served, n_imps, n_measured, n_viewable,
    view_history`` (the user's viewable share on other campaigns' measured
    impressions, NULL when there are none).
    """
    if inputs.has_viewable_column:
        measured, viewable = "(viewable IS NOT NULL)", "COALESCE(viewable, FALSE)"
    else:
        measured, viewable = sql_measured(rules), sql_viewable(rules)
    # Two statements: DuckDB runs the aggregate and the per-user window far faster apart than as one query.
    inputs.con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _agg AS
        SELECT user_id, campaign,
               min(served_at) AS first_served,
               count(*) AS n_imps,
               count_if({measured}) AS n_measured,
               count_if({viewable}) AS n_viewable
        FROM t_impressions
        GROUP BY user_id, campaign
    """).fetchall()
    inputs.con.execute(f"""
        CREATE OR REPLACE TABLE {table} AS
        SELECT user_id, campaign, first_served, n_imps, n_measured, n_viewable,
               CASE WHEN (sum(n_measured) OVER w) - n_measured > 0
                    THEN CAST((sum(n_viewable) OVER w) - n_viewable AS DOUBLE)
                         / CAST((sum(n_measured) OVER w) - n_measured AS DOUBLE) END AS view_history
        FROM _agg
        WINDOW w AS (PARTITION BY user_id)
    """).fetchall()
    inputs.con.execute("DROP TABLE _agg").fetchall()


def _numeric_values(inputs: Inputs, rules: CountingRules) -> dict[str, np.ndarray | None]:
    out: dict[str, np.ndarray | None] = {}
    for cov in rules.covariates:
        if cov in (FREQUENCY, VIEW_HISTORY):
            continue
        if inputs.numeric_covariates.get(cov):
            out[cov] = inputs.con.execute(
                f"SELECT {_q(cov)} FROM t_users WHERE {_q(cov)} IS NOT NULL").fetchnumpy()[cov]
        else:
            out[cov] = None
    return out


def count_sql(inputs: Inputs, rules: CountingRules, exposures: str = EXPOSURES_TABLE) -> RawCounts:
    """Cell-level counts from the exposure table and the conversions (DuckDB).

    Parameters
    ----------
    inputs : Inputs
        Validated inputs with their typed views.
    rules : CountingRules
    exposures : str
        Name of the table made by :func:`build_exposures`.
    """
    con = inputs.con
    spec = cell_spec(rules, _numeric_values(inputs, rules))
    has_users = inputs.has("users")
    cols = {FREQUENCY: "x.n_imps", VIEW_HISTORY: "x.view_history"}
    for cov in rules.covariates:
        if cov not in cols:
            cols[cov] = f"u.{_q(cov)}"
    join_users = "LEFT JOIN t_users u ON u.user_id = x.user_id" if has_users else ""
    user_covs = [c for c in rules.covariates if c not in (FREQUENCY, VIEW_HISTORY)]
    no_cov = (" OR ".join(f"u.{_q(c)} IS NULL" for c in user_covs)) if user_covs else "FALSE"
    w = rules.window_seconds
    knames = spec.key_names
    key_sel = "".join(f", {e} AS {k}" for e, k in zip(spec.sql_keys(cols), knames, strict=True))
    gk = ", ".join(["campaign", "arm", *knames])
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _cells AS
        SELECT x.user_id, x.campaign, x.first_served,
               CASE WHEN x.n_viewable > 0 THEN 'seen' ELSE 'unseen' END AS arm{key_sel}
        FROM {exposures} x {join_users}
        WHERE x.n_measured > 0
    """).fetchall()
    users = con.execute(f"SELECT {gk}, count(*) AS users FROM _cells GROUP BY {gk}").df()
    pairs = conversion_pairs(con, "_cells", ["campaign", "arm", *knames], w)
    users = label_cells(spec, users, ["campaign", "cell", "arm"])
    pairs = label_cells(spec, pairs, ["campaign", "cell", "arm", "outcome"])
    conversions = pairs[pairs["conversions"] > 0][["campaign", "cell", "arm", "outcome", "conversions"]]
    windows = (pairs.groupby(["campaign", "outcome"], as_index=False)[
        ["before_first_serve", "in_window", "after_window"]].sum())
    campaigns = con.execute(f"""
        SELECT x.campaign, sum(n_imps) AS impressions, sum(n_measured) AS measured_impressions,
               sum(n_viewable) AS viewable_impressions, count(*) AS users_served,
               sum(CASE WHEN n_measured = 0 THEN 1 ELSE 0 END) AS users_unmeasured_only,
               sum(CASE WHEN n_measured > 0 AND ({no_cov}) THEN 1 ELSE 0 END) AS users_without_covariates
        FROM {exposures} x {join_users}
        GROUP BY x.campaign
    """).df()
    totals = {
        "impression_rows": inputs.tables["impressions"].n_rows,
        "conversion_rows": inputs.tables["conversions"].n_rows,
        "conversion_rows_unknown_outcome": con.execute(
            "SELECT count(*) FROM t_conversions WHERE outcome NOT IN (SELECT outcome FROM t_outcomes)"
        ).fetchall()[0][0],
    }
    if rules.unexposed and has_users:
        users, conversions = _add_unexposed(inputs, rules, exposures, users, conversions)
        totals["users_table_rows"] = inputs.tables["users"].n_rows
    return RawCounts(users=users, conversions=conversions, windows=windows, campaigns=campaigns,
                     totals=totals)


def conversion_pairs(con, cells: str, group: list[str], window_seconds: int) -> pd.DataFrame:
    """Converters and conversion events by ``group`` and outcome, for a cells table and ``t_outcomes``.

    ``cells`` has one row per exposed (user, campaign) with ``first_served`` and the ``group``
    columns; conversions come from ``t_conversions``.
    """
    w = int(window_seconds)
    gk = ", ".join(group)
    ck = ", ".join(f"c.{g}" for g in group)
    return con.execute(f"""
        WITH ev AS (
            SELECT {ck}, c.user_id, o.outcome,
                   cv.converted_at > c.first_served
                       AND cv.converted_at <= c.first_served + INTERVAL {w} SECOND AS inside,
                   cv.converted_at <= c.first_served AS before,
                   cv.converted_at > c.first_served + INTERVAL {w} SECOND AS after
            FROM {cells} c
            JOIN t_outcomes o ON o.campaign = c.campaign
            JOIN t_conversions cv ON cv.user_id = c.user_id AND cv.outcome = o.outcome
        ), per_user AS (
            SELECT {gk}, outcome, user_id,
                   max(CASE WHEN inside THEN 1 ELSE 0 END) AS converted,
                   sum(CASE WHEN before THEN 1 ELSE 0 END) AS n_before,
                   sum(CASE WHEN inside THEN 1 ELSE 0 END) AS n_inside,
                   sum(CASE WHEN after THEN 1 ELSE 0 END) AS n_after
            FROM ev GROUP BY {gk}, outcome, user_id
        )
        SELECT {gk}, outcome, sum(converted) AS conversions,
               sum(n_before) AS before_first_serve, sum(n_inside) AS in_window, sum(n_after) AS after_window
        FROM per_user GROUP BY {gk}, outcome
    """).df()


def save_cache(inputs: Inputs, rules: CountingRules, raw: RawCounts, folder, exposures: str = EXPOSURES_TABLE) -> None:
    """Keep what a later re-count with new outcomes needs, as Parquet and JSON in ``folder``.

    ``cells.parquet`` (one row per exposed user and campaign: first serve, arm, cell),
    ``served.parquet`` (every served user and campaign), the raw cell counts and, with an
    unexposed arm, the users-table ids.  These files hold user identifiers: they stay in the
    workspace cache and never leave the data-preparation layer.
    """
    import json
    from pathlib import Path

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    con = inputs.con
    spec = cell_spec(rules, _numeric_values(inputs, rules))
    knames = spec.key_names
    keys = con.execute(f"SELECT DISTINCT {', '.join(knames) or '1 AS _none'} FROM _cells").df()
    keys["cell"] = spec.label_keys([keys[k].to_numpy() for k in knames], len(keys))
    con.register("_keymap", keys)
    on = " AND ".join(f"c.{k} IS NOT DISTINCT FROM m.{k}" for k in knames) or "TRUE"

    def copy(sql: str, name: str) -> None:
        path = str(folder / name).replace("'", "''")
        con.execute(f"COPY ({sql}) TO '{path}' (FORMAT PARQUET)").fetchall()

    copy(f"SELECT c.user_id, c.campaign, c.first_served, c.arm, m.cell FROM _cells c JOIN _keymap m ON {on}",
         "cells.parquet")
    copy(f"SELECT user_id, campaign FROM {exposures}", "served.parquet")
    copy(f"SELECT campaign, min(first_served) AS t0 FROM {exposures} GROUP BY campaign", "campaign_start.parquet")
    if inputs.has("users"):
        copy("SELECT user_id FROM t_users", "users.parquet")
    con.unregister("_keymap")
    for name in ("users", "conversions", "windows", "campaigns"):
        getattr(raw, name).to_parquet(folder / f"raw_{name}.parquet", index=False)
    (folder / "raw_totals.json").write_text(json.dumps({k: int(v) for k, v in raw.totals.items()}))


def _add_unexposed(inputs: Inputs, rules: CountingRules, exposures: str,
                   users: pd.DataFrame, conversions: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Users-table users never served the campaign, counted over the window from the campaign's first serve."""
    con = inputs.con
    w = rules.window_seconds
    un_users = con.execute(f"""
        WITH served AS (
            SELECT x.campaign, count(*) AS n FROM {exposures} x
            SEMI JOIN t_users u ON u.user_id = x.user_id GROUP BY x.campaign
        )
        SELECT c.campaign, '{UNEXPOSED_CELL}' AS cell, 'unexposed' AS arm,
               (SELECT count(*) FROM t_users) - COALESCE(s.n, 0) AS users
        FROM (SELECT DISTINCT campaign FROM {exposures}) c LEFT JOIN served s ON s.campaign = c.campaign
    """).df()
    un_conv = con.execute(f"""
        WITH t0 AS (SELECT campaign, min(first_served) AS t0 FROM {exposures} GROUP BY campaign)
        SELECT t0.campaign, '{UNEXPOSED_CELL}' AS cell, 'unexposed' AS arm, o.outcome,
               count(DISTINCT cv.user_id) AS conversions
        FROM t0
        JOIN t_outcomes o ON o.campaign = t0.campaign
        JOIN t_conversions cv ON cv.outcome = o.outcome
             AND cv.converted_at > t0.t0 AND cv.converted_at <= t0.t0 + INTERVAL {w} SECOND
        SEMI JOIN t_users u ON u.user_id = cv.user_id
        ANTI JOIN {exposures} x ON x.user_id = cv.user_id AND x.campaign = t0.campaign
        GROUP BY t0.campaign, o.outcome
    """).df()
    return (pd.concat([users, un_users], ignore_index=True),
            pd.concat([conversions, un_conv[un_conv.conversions > 0]], ignore_index=True))
