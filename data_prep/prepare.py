"""Logs to counts: the data-preparation entry point."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import pandas as pd
import xarray as xr

from liftpool.data_prep.counts import PrepSummary, finalize, to_dataset
from liftpool.data_prep.engine_pandas import count_pandas, typed_frames
from liftpool.data_prep.engine_sql import build_exposures, count_sql, save_cache
from liftpool.data_prep.errors import ConfigError
from liftpool.data_prep.rules import BUILTIN_COVARIATES, CountingRules
from liftpool.data_prep.sources import Inputs, open_inputs

__all__ = ["prepare_counts", "PrepResult", "ENGINES"]

ENGINES = ("duckdb", "pandas", "spark")


@dataclass
class PrepResult:
    """Counts and the summary of how they were made.

    Attributes
    ----------
    counts : DataFrame
        ``campaign, cell, arm, outcome, role, users, conversions``.
    summary : PrepSummary
    rules : CountingRules
    spend : DataFrame or None
        The validated spend table (``campaign, spend, value_per_conversion``) when given.
    """

    counts: pd.DataFrame
    summary: PrepSummary
    rules: CountingRules
    spend: pd.DataFrame | None = None

    @property
    def dataset(self) -> xr.Dataset:
        """The counts as an xarray Dataset with named dimensions."""
        return to_dataset(self.counts)


def prepare_counts(
    impressions,
    conversions,
    outcomes,
    users=None,
    spend=None,
    rules: CountingRules | None = None,
    engine: str = "duckdb",
    progress: Callable[[str], None] | None = None,
    inputs: Inputs | None = None,
    cache=None,
    spark=None,
) -> PrepResult:
    """Turn impression and conversion logs into seen/unseen counts by campaign, cell and outcome.

    Parameters
    ----------
    impressions, conversions, outcomes : path or DataFrame
        The logs (CSV or Parquet by extension) or DataFrames; see docs/data-format.md.
    users, spend : path or DataFrame, optional
        User covariates; campaign spend and value per conversion.
    rules : CountingRules, optional
        Counting rules; the documented defaults when omitted.
    engine : {"duckdb", "pandas", "spark"}
        ``duckdb`` works out of core on files of any size; ``pandas`` loads the
        typed tables into memory (for DataFrames and as a cross-check); ``spark``
        runs the DuckDB engine's SQL on Apache Spark (``liftpool[spark]``), reading
        any path Spark can read.
    progress : callable, optional
        Called with a short text before each step.
    inputs : Inputs, optional
        Already opened and validated inputs (skips loading).
    cache : path, optional
        A new folder in which to keep the exposure cells and raw counts, so that
        added placebo outcomes can be counted later without reading the impressions
        again (DuckDB engine only).  It holds user identifiers: keep it private.
    spark : pyspark.sql.SparkSession, optional
        The session for ``engine="spark"`` (default: the active one, or a new local one).

    Returns
    -------
    PrepResult

    Raises
    ------
    InputError
        On any problem with the inputs; nothing has been written.
    """
    rules = rules or CountingRules()
    if engine not in ENGINES:
        raise ConfigError.invalid_choice("engine", engine, ENGINES)
    say = progress or (lambda _msg: None)
    if engine == "spark" and cache is not None:
        raise ConfigError(problem="the exposure cache is kept by the DuckDB engine only",
                          fix="prepare with --engine duckdb in a workspace, or without a cache")
    user_covs = tuple(c for c in rules.covariates if c not in BUILTIN_COVARIATES)
    if inputs is None:
        say("reading and checking inputs" + (" (Spark)" if engine == "spark" else ""))
        con = None
        if engine == "spark":
            from liftpool.data_prep.engine_spark import SparkConnection, spark_session

            con = SparkConnection(spark if spark is not None else spark_session())
        inputs = open_inputs(impressions, conversions, outcomes, users=users, spend=spend, covariates=user_covs,
                             con=con, large_ad_pixels=rules.large_ad_pixels)
    if engine in ("duckdb", "spark"):
        say("building exposures (one pass over the impressions)")
        build_exposures(inputs, rules)
        say("counting conversions by campaign, cell and arm")
        raw = count_sql(inputs, rules)
        if cache is not None:
            say("keeping the exposure cache")
            save_cache(inputs, rules, raw, cache)
    else:
        say("loading typed tables into pandas")
        frames = typed_frames(inputs)
        say("counting in pandas")
        raw = count_pandas(frames, rules, inputs.has_viewable_column, inputs.numeric_covariates)
    outcomes_df = inputs.con.execute("SELECT campaign, outcome, role FROM t_outcomes").df()
    say("applying the cell rules")
    counts, summary = finalize(raw, outcomes_df, rules)
    summary.warnings = list(inputs.warnings)
    spend_df = inputs.con.execute("SELECT * FROM t_spend").df() if inputs.has("spend") else None
    return PrepResult(counts=counts, summary=summary, rules=rules, spend=spend_df)
