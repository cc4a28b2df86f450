"""The pandas counting engine: the same rules in NumPy/pandas, for DataFrames in memory.

It exists for the Python API on small and medium data and as an independent
cross-check of the SQL engine: the tests require both to give identical counts.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from liftpool.data_prep.cells import UNEXPOSED_CELL, cell_spec, label_cells
from liftpool.data_prep.raw import RawCounts
from liftpool.data_prep.rules import FREQUENCY, VIEW_HISTORY, CountingRules
from liftpool.data_prep.sources import Inputs
from liftpool.data_prep.viewability import classify

__all__ = ["count_pandas", "typed_frames"]


def typed_frames(inputs: Inputs) -> dict[str, pd.DataFrame]:
    """The validated, typed input tables as pandas DataFrames."""
    return {k: inputs.con.execute(f"SELECT * FROM {t.view}").df() for k, t in inputs.tables.items()}


def count_pandas(
    frames: dict[str, pd.DataFrame],
    rules: CountingRules,
    has_viewable_column: bool,
    numeric_covariates: dict[str, bool],
) -> RawCounts:
    """Cell-level counts from typed DataFrames (see :func:`typed_frames`)."""
    imp = frames["impressions"]
    conv = frames["conversions"]
    outcomes = frames["outcomes"][["campaign", "outcome"]]
    users = frames.get("users")

    if has_viewable_column:
        v = imp["viewable"]
        measured = v.notna().to_numpy()
        viewable = v.fillna(False).astype(bool).to_numpy()
    else:
        measured, viewable = classify(
            imp["ad_format"].to_numpy(dtype=object),
            imp["ad_width"].to_numpy(dtype=float, na_value=np.nan),
            imp["ad_height"].to_numpy(dtype=float, na_value=np.nan),
            imp["seconds_in_view_50"].to_numpy(dtype=float, na_value=np.nan),
            imp["seconds_in_view_30"].to_numpy(dtype=float, na_value=np.nan),
            rules,
        )
    work = pd.DataFrame({
        "user_id": imp["user_id"].to_numpy(), "campaign": imp["campaign"].to_numpy(dtype=object),
        "served_at": imp["served_at"].to_numpy(),
        "m": measured.astype(np.int64), "v": viewable.astype(np.int64),
    })
    x = work.groupby(["user_id", "campaign"], sort=False).agg(
        first_served=("served_at", "min"), n_imps=("served_at", "size"),
        n_measured=("m", "sum"), n_viewable=("v", "sum"),
    ).reset_index()
    tot = x.groupby("user_id")[["n_measured", "n_viewable"]].transform("sum")
    other_m = (tot["n_measured"] - x["n_measured"]).to_numpy()
    other_v = (tot["n_viewable"] - x["n_viewable"]).to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        x["view_history"] = np.where(other_m > 0, other_v.astype(float) / other_m.astype(float), np.nan)

    user_covs = [c for c in rules.covariates if c not in (FREQUENCY, VIEW_HISTORY)]
    numeric_values = {}
    if user_covs:
        for c in user_covs:
            numeric_values[c] = (users[c].dropna().to_numpy(dtype=float) if numeric_covariates.get(c) else None)
        x = x.merge(users[["user_id", *user_covs]], on="user_id", how="left")
    spec = cell_spec(rules, numeric_values)

    served = x
    ex = x[x["n_measured"] > 0].copy()
    values = {FREQUENCY: ex["n_imps"].to_numpy(dtype=float), VIEW_HISTORY: ex["view_history"].to_numpy()}
    for c in user_covs:
        col = ex[c]
        values[c] = (col.to_numpy(dtype=float, na_value=np.nan) if numeric_covariates.get(c)
                     else col.astype(object).where(col.notna(), None).to_numpy())
    knames = spec.key_names
    for k, arr in zip(knames, spec.keys(values), strict=True):
        ex[k] = arr
    ex["arm"] = np.where(ex["n_viewable"] > 0, "seen", "unseen")
    gk = ["campaign", "arm", *knames]

    users_by_cell = ex.groupby(gk, as_index=False, dropna=False).size().rename(columns={"size": "users"})
    users_by_cell = label_cells(spec, users_by_cell, ["campaign", "cell", "arm"])

    ev = (ex[["user_id", "campaign", "first_served", "arm", *knames]]
          .merge(outcomes, on="campaign").merge(conv[["user_id", "outcome", "converted_at"]],
                                                 on=["user_id", "outcome"]))
    end = ev["first_served"] + pd.Timedelta(seconds=rules.window_seconds)
    ev["inside"] = ((ev["converted_at"] > ev["first_served"]) & (ev["converted_at"] <= end)).astype(np.int64)
    ev["before"] = (ev["converted_at"] <= ev["first_served"]).astype(np.int64)
    ev["after"] = (ev["converted_at"] > end).astype(np.int64)
    per_user = ev.groupby([*gk, "outcome", "user_id"], as_index=False, dropna=False).agg(
        converted=("inside", "max"), before_first_serve=("before", "sum"),
        in_window=("inside", "sum"), after_window=("after", "sum"))
    per_cell = per_user.groupby([*gk, "outcome"], as_index=False, dropna=False)[
        ["converted", "before_first_serve", "in_window", "after_window"]].sum()
    keys = ["campaign", "cell", "arm", "outcome"]
    per_cell = label_cells(spec, per_cell, keys)
    conversions = per_cell[per_cell["converted"] > 0].rename(columns={"converted": "conversions"})[
        [*keys, "conversions"]]
    windows = per_cell.groupby(["campaign", "outcome"], as_index=False)[
        ["before_first_serve", "in_window", "after_window"]].sum()

    no_cov = np.zeros(len(served), dtype=bool)
    for c in user_covs:
        no_cov |= served[c].isna().to_numpy()
    served = served.assign(
        unmeasured_only=(served["n_measured"] == 0).astype(np.int64),
        without_cov=((served["n_measured"] > 0).to_numpy() & no_cov).astype(np.int64))
    campaigns = served.groupby("campaign", as_index=False).agg(
        impressions=("n_imps", "sum"), measured_impressions=("n_measured", "sum"),
        viewable_impressions=("n_viewable", "sum"), users_served=("user_id", "size"),
        users_unmeasured_only=("unmeasured_only", "sum"), users_without_covariates=("without_cov", "sum"))

    totals = {
        "impression_rows": len(imp),
        "conversion_rows": len(conv),
        "conversion_rows_unknown_outcome": int((~conv["outcome"].isin(frames["outcomes"]["outcome"])).sum()),
    }
    if rules.unexposed and users is not None:
        users_by_cell, conversions = _add_unexposed(x, users, outcomes, conv, rules, users_by_cell, conversions)
        totals["users_table_rows"] = len(users)
    return RawCounts(users=users_by_cell, conversions=conversions, windows=windows,
                     campaigns=campaigns, totals=totals)


def _add_unexposed(x, users, outcomes, conv, rules, users_by_cell, conversions):
    known = set(users["user_id"])
    n_users = len(users)
    rows_u, rows_c = [], []
    t0 = x.groupby("campaign")["first_served"].min()
    for camp, start in t0.items():
        served_ids = set(x.loc[x["campaign"] == camp, "user_id"])
        rows_u.append((camp, UNEXPOSED_CELL, "unexposed", n_users - len(served_ids & known)))
        end = start + pd.Timedelta(seconds=rules.window_seconds)
        for outcome in outcomes.loc[outcomes["campaign"] == camp, "outcome"]:
            c = conv[(conv["outcome"] == outcome) & (conv["converted_at"] > start) & (conv["converted_at"] <= end)]
            ids = set(c["user_id"]) & known
            n = len(ids - served_ids)
            if n:
                rows_c.append((camp, UNEXPOSED_CELL, "unexposed", outcome, n))
    users_by_cell = pd.concat([users_by_cell, pd.DataFrame(rows_u, columns=users_by_cell.columns)],
                              ignore_index=True)
    if rows_c:
        conversions = pd.concat([conversions, pd.DataFrame(rows_c, columns=conversions.columns)],
                                ignore_index=True)
    return users_by_cell, conversions
