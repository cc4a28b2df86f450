"""Confounder screening, data side: balance of candidate covariates and counts for any cell choice.

Everything is computed from the exposure table that data preparation builds (one row per
user and campaign) and the same counting code, so a screen never changes the counting rules:
the counts for a candidate covariate set are exactly what ``prepare`` would write with
``covariates`` set to it.

The standardized mean difference (SMD) between seen and unseen users is, for a numeric
covariate, ``(mean_seen - mean_unseen) / sqrt((var_seen + var_unseen) / 2)`` and, for each
level of a categorical covariate, the same with ``p (1 - p)`` as the variances (Austin 2009,
Statistics in Medicine 28(25), equations 1 and 2).  ``|SMD| > 0.1`` is flagged, the usual
rule of thumb for balance diagnostics (same source).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from liftpool.data_prep.cells import cell_spec
from liftpool.data_prep.counts import finalize
from liftpool.data_prep.engine_sql import _numeric_values, _q, build_exposures, count_sql
from liftpool.data_prep.rules import BUILTIN_COVARIATES, FREQUENCY, VIEW_HISTORY, CountingRules
from liftpool.data_prep.sources import Inputs

__all__ = ["smd_numeric", "smd_binary", "ScreenData", "open_screen", "SMD_FLAG", "users_columns"]

#: |SMD| above this is flagged (Austin 2009, Statistics in Medicine 28(25)).
SMD_FLAG = 0.1
SCREEN_TABLE = "_screen_users"


def smd_numeric(mean1, var1, mean0, var0) -> np.ndarray:
    """Standardized mean difference of a numeric covariate (Austin 2009, eq. 1); 0 where both variances are 0."""
    mean1, var1, mean0, var0 = (np.asarray(x, dtype=float) for x in (mean1, var1, mean0, var0))
    den = np.sqrt((var1 + var0) / 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0, (mean1 - mean0) / np.where(den > 0, den, 1.0), 0.0)
    return out


def smd_binary(p1, p0) -> np.ndarray:
    """Standardized difference of a proportion, e.g. one level of a categorical (Austin 2009, eq. 2)."""
    p1, p0 = np.asarray(p1, dtype=float), np.asarray(p0, dtype=float)
    return smd_numeric(p1, p1 * (1 - p1), p0, p0 * (1 - p0))


def users_columns(source) -> list[str]:
    """Column names of a users table (file or DataFrame) other than ``user_id``, without loading it."""
    if source is None:
        return []
    if isinstance(source, pd.DataFrame):
        cols = list(source.columns)
    else:
        from liftpool.data_prep.sources import file_format

        if file_format(source) == "parquet":
            import pyarrow.parquet as pq

            cols = list(pq.read_schema(source).names)
        else:
            cols = list(pd.read_csv(source, nrows=0).columns)
    return [c for c in cols if c != "user_id"]


@dataclass
class ScreenData:
    """The screening view of validated inputs: candidate covariates over exposed, measured users.

    Attributes
    ----------
    inputs : Inputs
    rules : CountingRules
        The counting rules (their ``covariates`` are ignored: each screen step sets its own).
    candidates : list of str
    numeric : dict
        Candidate -> True when numeric (raw values are compared), False when categorical.
    """

    inputs: Inputs
    rules: CountingRules
    candidates: list[str]
    numeric: dict[str, bool]
    _counts_cache: dict = field(default_factory=dict, repr=False)

    @property
    def con(self):
        return self.inputs.con

    def _value_expr(self, cov: str) -> str:
        return {FREQUENCY: "n_imps", VIEW_HISTORY: "view_history"}.get(cov, _q(cov))

    def counts(self, covariates: tuple[str, ...]):
        """Counts and prep summary with these cell covariates (the standard counting code, cached)."""
        key = tuple(covariates)
        if key not in self._counts_cache:
            rules = replace(self.rules, covariates=key)
            raw = count_sql(self.inputs, rules)
            outcomes = self.con.execute("SELECT campaign, outcome, role FROM t_outcomes").df()
            self._counts_cache[key] = finalize(raw, outcomes, rules)
        return self._counts_cache[key]

    def _weights_sql(self, stratify: tuple[str, ...]) -> tuple[str, str]:
        """A subquery of stratification weights by (campaign, cell keys, arm) and its join condition.

        Unseen users of a cell get ``(n_seen / N_seen) / (n_unseen / N_unseen)`` (their cell
        distribution is made the seen users'); seen users weight 1; cells lacking an arm get 0.
        """
        if not stratify:
            return "", "1.0"
        rules = replace(self.rules, covariates=tuple(stratify))
        spec = cell_spec(rules, _numeric_values(self.inputs, rules))
        cols = {c: f"s.{self._value_expr(c)}" for c in stratify}
        keys = spec.sql_keys(cols)
        kexpr = ", ".join(f"{k} AS _w{i}" for i, k in enumerate(keys))
        knames = ", ".join(f"_w{i}" for i in range(len(keys)))
        sub = f"""
            (WITH c AS (SELECT campaign, arm, {kexpr}, count(*) AS n FROM {SCREEN_TABLE} s
                        GROUP BY ALL),
                  piv AS (SELECT campaign, {knames},
                                 sum(CASE WHEN arm = 'seen' THEN n ELSE 0 END) AS ns,
                                 sum(CASE WHEN arm = 'unseen' THEN n ELSE 0 END) AS nu
                          FROM c GROUP BY ALL),
                  tot AS (SELECT campaign, sum(ns) AS tot_s, sum(nu) AS tot_u FROM piv WHERE ns > 0 AND nu > 0
                          GROUP BY campaign)
             SELECT piv.campaign, {", ".join(f"piv._w{i}" for i in range(len(keys)))},
                    CASE WHEN piv.ns > 0 AND piv.nu > 0 THEN (piv.ns / tot.tot_s) / (piv.nu / tot.tot_u) ELSE 0 END AS w_unseen,
                    CASE WHEN piv.ns > 0 AND piv.nu > 0 THEN 1.0 ELSE 0 END AS w_seen
             FROM piv JOIN tot USING (campaign)) wt"""
        on = " AND ".join(["wt.campaign = s.campaign"] + [f"wt._w{i} IS NOT DISTINCT FROM {k}"
                                                             for i, k in enumerate(keys)])
        return f"JOIN {sub} ON {on}", "CASE WHEN s.arm = 'seen' THEN wt.w_seen ELSE wt.w_unseen END"

    def balance(self, stratify: tuple[str, ...] = ()) -> pd.DataFrame:
        """SMD of every candidate between seen and unseen users, per campaign (and level).

        Parameters
        ----------
        stratify : tuple of str
            Stratify on these covariates' cells first (weighting unseen users to the seen users'
            cell distribution); the denominators stay the unweighted ones so that before and
            after are on one scale (common practice, no source).

        Returns
        -------
        DataFrame
            ``campaign, covariate, level, smd, seen_value, unseen_value, flagged``; ``level`` is
            empty for a numeric covariate's mean (its missing share is the level ``missing``).
        """
        join, wexpr = self._weights_sql(tuple(stratify))
        rows = []
        for cov in self.candidates:
            v = f"s.{self._value_expr(cov)}"
            if self.numeric[cov]:
                num = self.con.execute(f"""
                    SELECT s.campaign, s.arm,
                           sum({wexpr} * CASE WHEN {v} IS NOT NULL THEN 1 ELSE 0 END) AS w,
                           sum({wexpr} * CASE WHEN {v} IS NOT NULL THEN {v} ELSE 0 END) AS wx,
                           sum({wexpr} * CASE WHEN {v} IS NOT NULL THEN {v} * {v} ELSE 0 END) AS wxx,
                           sum({wexpr}) AS wall,
                           sum({wexpr} * CASE WHEN {v} IS NULL THEN 1 ELSE 0 END) AS wmiss,
                           avg({v}) AS raw_mean, var_samp({v}) AS raw_var,
                           avg(CASE WHEN {v} IS NULL THEN 1.0 ELSE 0.0 END) AS raw_miss
                    FROM {SCREEN_TABLE} s {join} GROUP BY s.campaign, s.arm""").df()
                for camp, g in num.groupby("campaign", sort=True):
                    g = g.set_index("arm")
                    if not {"seen", "unseen"} <= set(g.index):
                        continue
                    s_, u_ = g.loc["seen"], g.loc["unseen"]
                    ms = s_["wx"] / s_["w"] if s_["w"] > 0 else np.nan
                    mu = u_["wx"] / u_["w"] if u_["w"] > 0 else np.nan
                    smd = float(smd_numeric(ms, s_["raw_var"] or 0.0, mu, u_["raw_var"] or 0.0))
                    rows.append((camp, cov, "", smd, ms, mu))
                    if (s_["raw_miss"] or 0) > 0 or (u_["raw_miss"] or 0) > 0:
                        ps_raw, pu_raw = float(s_["raw_miss"]), float(u_["raw_miss"])
                        ps = s_["wmiss"] / s_["wall"] if s_["wall"] > 0 else np.nan
                        pu = u_["wmiss"] / u_["wall"] if u_["wall"] > 0 else np.nan
                        den = np.sqrt((ps_raw * (1 - ps_raw) + pu_raw * (1 - pu_raw)) / 2)
                        rows.append((camp, cov, "missing", float((ps - pu) / den) if den > 0 else 0.0, ps, pu))
            else:
                cat = self.con.execute(f"""
                    SELECT s.campaign, s.arm, COALESCE(CAST({v} AS VARCHAR), 'missing') AS level,
                           sum({wexpr}) AS w, count(*) AS n
                    FROM {SCREEN_TABLE} s {join} GROUP BY ALL""").df()
                for camp, g in cat.groupby("campaign", sort=True):
                    w = g.pivot_table(index="level", columns="arm", values="w", aggfunc="sum", fill_value=0)
                    n = g.pivot_table(index="level", columns="arm", values="n", aggfunc="sum", fill_value=0)
                    if not {"seen", "unseen"} <= set(w.columns):
                        continue
                    p_w = w / w.sum()
                    p_n = n / n.sum()
                    den = np.sqrt((p_n["seen"] * (1 - p_n["seen"]) + p_n["unseen"] * (1 - p_n["unseen"])) / 2)
                    smd = np.where(den > 0, (p_w["seen"] - p_w["unseen"]) / den.where(den > 0, 1.0), 0.0)
                    for lev, sm, a, b in zip(w.index, smd, p_w["seen"], p_w["unseen"], strict=True):
                        rows.append((camp, cov, str(lev), float(sm), float(a), float(b)))
        out = pd.DataFrame(rows, columns=["campaign", "covariate", "level", "smd", "seen_value", "unseen_value"])
        out["flagged"] = out["smd"].abs() > SMD_FLAG
        n = self.con.execute(f"SELECT campaign, count(*) AS users FROM {SCREEN_TABLE} GROUP BY campaign").df()
        return out.merge(n, on="campaign", how="left")

    def placebo_association(self) -> pd.DataFrame:
        """How each candidate differs between placebo converters and non-converters (SMD, per level).

        Returns
        -------
        DataFrame
            ``covariate, level, smd`` and ``mean_abs_smd``: the mean over campaigns and placebo
            outcomes of the SMD and of its absolute value, weighted by converters.
        """
        w = int(self.rules.window_seconds)
        self.con.execute(f"""
            CREATE OR REPLACE TEMP TABLE _screen_placebo AS
            SELECT s.user_id, s.campaign, o.outcome,
                   max(CASE WHEN cv.converted_at > s.first_served
                             AND cv.converted_at <= s.first_served + INTERVAL {w} SECOND THEN 1 ELSE 0 END)::BIGINT AS y
            FROM {SCREEN_TABLE} s
            JOIN t_outcomes o ON o.campaign = s.campaign AND o.role = 'placebo'
            LEFT JOIN t_conversions cv ON cv.user_id = s.user_id AND cv.outcome = o.outcome
            GROUP BY ALL""").fetchall()
        rows = []
        for cov in self.candidates:
            v = f"s.{self._value_expr(cov)}"
            if self.numeric[cov]:
                g = self.con.execute(f"""
                    SELECT p.campaign, p.outcome, p.y, count({v}) AS n, avg({v}) AS m, var_samp({v}) AS var
                    FROM _screen_placebo p JOIN {SCREEN_TABLE} s USING (user_id, campaign)
                    GROUP BY ALL""").df()
                piv = g.pivot_table(index=["campaign", "outcome"], columns="y", values=["n", "m", "var"],
                                    dropna=False)
                if 1 not in piv["n"].columns or 0 not in piv["n"].columns:
                    continue
                piv = piv.dropna()
                if piv.empty:
                    continue
                smd = smd_numeric(piv[("m", 1)], piv[("var", 1)], piv[("m", 0)], piv[("var", 0)])
                wts = piv[("n", 1)].to_numpy(float)  # converters: the SMD's precision grows with them
                if len(wts) and wts.sum() > 0:
                    rows.append((cov, "", float(np.average(smd, weights=wts)),
                                 float(np.average(np.abs(smd), weights=wts))))
            else:
                g = self.con.execute(f"""
                    SELECT p.campaign, p.outcome, p.y, COALESCE(CAST({v} AS VARCHAR), 'missing') AS level,
                           count(*) AS n
                    FROM _screen_placebo p JOIN {SCREEN_TABLE} s USING (user_id, campaign)
                    GROUP BY ALL""").df()
                tot = g.groupby(["campaign", "outcome", "y"])["n"].transform("sum")
                g["p"] = g["n"] / tot
                piv = g.pivot_table(index=["campaign", "outcome", "level"], columns="y", values="p", fill_value=0.0)
                if 1 not in piv.columns or 0 not in piv.columns:
                    continue
                conv = g[g["y"] == 1].groupby(["campaign", "outcome"])["n"].sum()
                piv["smd"] = smd_binary(piv[1], piv[0])
                for lev, gg in piv.reset_index().groupby("level"):
                    wts = conv.reindex(list(zip(gg["campaign"], gg["outcome"], strict=True))).fillna(0).to_numpy(float)
                    if wts.sum() > 0:
                        rows.append((cov, str(lev), float(np.average(gg["smd"], weights=wts)),
                                     float(np.average(gg["smd"].abs(), weights=wts))))
        return pd.DataFrame(rows, columns=["covariate", "level", "smd", "mean_abs_smd"])


def open_screen(inputs: Inputs, rules: CountingRules | None = None, candidates: list[str] | None = None,
                exposures_built: bool = False) -> ScreenData:
    """Build the screening table for validated inputs.

    Parameters
    ----------
    inputs : Inputs
        Opened with ``covariates`` = every users column to screen.
    rules : CountingRules, optional
    candidates : list of str, optional
        Default: every users column opened as a covariate, then the built-ins.
    exposures_built : bool
        The exposure table already exists on ``inputs.con`` (skip the impressions pass).
    """
    rules = rules or CountingRules()
    if not exposures_built:
        build_exposures(inputs, rules)
    user_cols = list(inputs.numeric_covariates)
    cands = list(candidates) if candidates is not None else user_cols + list(BUILTIN_COVARIATES)
    numeric = {c: (True if c in BUILTIN_COVARIATES else bool(inputs.numeric_covariates.get(c))) for c in cands}
    sel = ", ".join(f"u.{_q(c)}" for c in user_cols)
    join = "LEFT JOIN t_users u ON u.user_id = x.user_id" if inputs.has("users") and user_cols else ""
    inputs.con.execute(f"""
        CREATE OR REPLACE TEMP TABLE {SCREEN_TABLE} AS
        SELECT x.user_id, x.campaign, x.first_served, x.n_imps, x.view_history,
               CASE WHEN x.n_viewable > 0 THEN 'seen' ELSE 'unseen' END AS arm{(", " + sel) if join else ""}
        FROM exposures x {join}
        WHERE x.n_measured > 0""").fetchall()
    return ScreenData(inputs=inputs, rules=rules, candidates=cands, numeric=numeric)
