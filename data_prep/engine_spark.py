"""The Spark counting engine: the DuckDB engine's SQL, run on Apache Spark.

There is one definition of the counting rules: the SQL text that
:mod:`liftpool.data_prep.engine_sql` and :mod:`liftpool.data_prep.sources` build
(validation, typed views, exposures, cells, conversions).  :class:`SparkConnection`
stands in for the DuckDB connection: each statement is transpiled from DuckDB's
dialect to Spark SQL by sqlglot (a general-purpose SQL transpiler) and run with
``spark.sql``, so the two engines cannot drift apart.  Intermediate tables become
cached temporary views; only the small aggregates are collected to the driver.

Needs the optional extra ``liftpool[spark]`` (pyspark, sqlglot) and Java 17+.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from liftpool.data_prep.errors import InputError

__all__ = ["SparkConnection", "spark_session", "to_spark_sql", "spark_available", "is_spark", "parquet_paths"]

_CREATE = re.compile(r"^\s*CREATE\s+(?:OR\s+REPLACE\s+)?(TEMP\s+|TEMPORARY\s+)?(TABLE|VIEW)\s+(\w+)\s+AS\s+(.*)$",
                     re.IGNORECASE | re.DOTALL)
_DROP = re.compile(r"^\s*DROP\s+(TABLE|VIEW)\s+(?:IF\s+EXISTS\s+)?(\w+)\s*$", re.IGNORECASE)
_SET = re.compile(r"^\s*SET\s+", re.IGNORECASE)


def spark_available() -> bool:
    """True when pyspark and sqlglot import (Java is checked when the session starts)."""
    try:
        import pyspark  # noqa: F401
        import sqlglot  # noqa: F401
    except ImportError:
        return False
    return True


def _require():
    if not spark_available():
        raise InputError(problem="the Spark engine needs pyspark and sqlglot, which are not installed",
                         fix="pip install 'liftpool[spark]' (and Java 17 or newer), or use --engine duckdb")


def spark_session(master: str | None = None, app_name: str = "liftpool-prepare", conf: dict | None = None):
    """The active Spark session, or a new one (``master`` e.g. ``local[2]``; spark-submit sets its own).

    The session time zone is set to UTC, as DuckDB's is, so timestamps mean the same instants.
    ``conf`` adds Spark settings (e.g. ``{"spark.driver.memory": "4g"}``) for a new session.
    """
    _require()
    from pyspark.sql import SparkSession

    b = SparkSession.builder.appName(app_name)
    for k, v in (conf or {}).items():
        b = b.config(k, v)
    if master:
        b = b.master(master)
    b = (b.config("spark.sql.session.timeZone", "UTC")
         .config("spark.ui.enabled", "false")
         .config("spark.ui.showConsoleProgress", "false")
         .config("spark.sql.execution.arrow.pyspark.enabled", "true"))
    if master and master.startswith("local"):
        b = b.config("spark.sql.shuffle.partitions", "8")
    s = b.getOrCreate()
    s.conf.set("spark.sql.session.timeZone", "UTC")
    if master and master.startswith("local"):
        import logging

        s.sparkContext.setLogLevel("FATAL")  # errors reach Python as exceptions; the logged copies are noise
        for name in ("pyspark", "SQLQueryContextLogger", "py4j"):
            logging.getLogger(name).setLevel(logging.CRITICAL)
    return s


def to_spark_sql(sql: str) -> str:
    """Transpile one DuckDB statement to Spark SQL (sqlglot), with two rewrites sqlglot leaves to us.

    * ``row_number() OVER ()`` needs an order in Spark: the file order is
      ``monotonically_increasing_id()`` (row numbers of bad rows in messages).
    * DuckDB's ``TIMESTAMPTZ`` parse then ``TIMESTAMP`` cast is Spark's ``TIMESTAMP`` then
      ``TIMESTAMP_NTZ`` under a UTC session: the same UTC wall-clock value.
    """
    import sqlglot

    out = sqlglot.transpile(sql, read="duckdb", write="spark")[0]
    out = re.sub(r"ROW_NUMBER\(\)\s+OVER\s*\(\s*\)", "ROW_NUMBER() OVER (ORDER BY MONOTONICALLY_INCREASING_ID())",
                 out, flags=re.IGNORECASE)
    return _replace_call(out, "IS_INF", lambda arg: f"(ABS({arg}) = DOUBLE('inf'))")


def _replace_call(sql: str, name: str, make) -> str:
    """Replace every ``name(arg)`` (balanced parentheses) by ``make(arg)``."""
    out, i, key = [], 0, name.upper() + "("
    up = sql.upper()
    while True:
        j = up.find(key, i)
        if j < 0:
            out.append(sql[i:])
            return "".join(out)
        k, depth = j + len(key), 1
        while depth:
            depth += {"(": 1, ")": -1}.get(sql[k], 0)
            k += 1
        out.append(sql[i:j])
        out.append(make(_replace_call(sql[j + len(key): k - 1], name, make)))
        i = k


class _Result:
    """The part of DuckDB's result API the engine uses, over a Spark DataFrame (or nothing)."""

    def __init__(self, df=None):
        self._df = df

    def fetchall(self) -> list[tuple]:
        if self._df is None:
            return []
        return [tuple(r) for r in self._df.collect()]

    def df(self) -> pd.DataFrame:
        if self._df is None:
            return pd.DataFrame()
        cols = self._df.columns
        rows = self._df.collect()
        return pd.DataFrame([tuple(r) for r in rows], columns=cols) if rows else pd.DataFrame(
            {c: pd.Series(dtype=object) for c in cols})

    def fetchnumpy(self) -> dict[str, np.ndarray]:
        d = self.df()
        return {c: d[c].to_numpy() for c in d.columns}


#: Spark SQL types of pandas dtype kinds (anything else travels as text).
_SPARK_TYPES = {"i": "bigint", "u": "bigint", "f": "double", "b": "boolean", "M": "timestamp"}


def _spark_schema(df: pd.DataFrame) -> str:
    return ", ".join(f"`{c}` {_SPARK_TYPES.get(df[c].dtype.kind, 'string')}" for c in df.columns)


def _plain_rows(df: pd.DataFrame) -> list[tuple]:
    """The rows as Python values: missing values as None, text columns as str."""
    cols = []
    for c in df.columns:
        s = df[c]
        kind = s.dtype.kind
        if kind == "M":
            s = s.dt.tz_convert("UTC").dt.tz_localize(None) if s.dt.tz is not None else s  # the session's UTC
            vals = [None if pd.isna(v) else v.to_pydatetime() for v in s]
        elif kind in _SPARK_TYPES:
            vals = [None if pd.isna(v) else v.item() if hasattr(v, "item") else v for v in s.astype(object)]
        else:
            vals = [None if v is None or (isinstance(v, float) and v != v) else str(v) for v in s.astype(object)]
        cols.append(vals)
    return list(zip(*cols, strict=True)) if cols else []


class SparkConnection:
    """A DuckDB-connection look-alike that runs each statement on Spark.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    """

    engine = "spark"

    def __init__(self, spark):
        self.spark = spark
        self._frames: dict[str, object] = {}

    def execute(self, sql: str, params=None) -> _Result:
        if params:
            raise NotImplementedError("parameters are not used by the engine")
        if _SET.match(sql):
            return _Result()
        m = _DROP.match(sql)
        if m:
            name = m.group(2)
            self.spark.catalog.dropTempView(name)
            df = self._frames.pop(name, None)
            if df is not None:
                df.unpersist()
            return _Result()
        m = _CREATE.match(sql)
        if m:
            kind, name, body = m.group(2).upper(), m.group(3), m.group(4)
            if kind == "TABLE":
                # a materialized intermediate: computed once and kept (its plan no longer needs its inputs)
                old = self._frames.pop(name, None)
                df = self.spark.sql(to_spark_sql(body)).persist()
                df.count()
                df.createOrReplaceTempView(name)
                self._frames[name] = df
                if old is not None:
                    old.unpersist()
            else:
                self.spark.sql(f"CREATE OR REPLACE TEMPORARY VIEW {name} AS {to_spark_sql(body)}")
            return _Result()
        return _Result(self.spark.sql(to_spark_sql(sql)))

    def register(self, name: str, df: pd.DataFrame) -> None:
        """Make a small pandas table (e.g. a key map) visible to SQL as ``name``.

        Passed as plain rows with a schema from the dtypes, not through PySpark's pandas conversion:
        that path does not support pandas 3 yet (it says so with a FutureWarning on every call).
        """
        sdf = self.spark.createDataFrame(_plain_rows(df), _spark_schema(df))
        sdf.createOrReplaceTempView(name)
        self._frames[name] = sdf

    def load_frame(self, view: str, df: pd.DataFrame) -> tuple[dict[str, str], int]:
        """Register a pandas table as ``view``; return DuckDB-style types and the row count."""
        self.register(view, df)
        return _describe(self.spark.table(view))

    def load_files(self, view: str, paths: list[str], fmt: str, label: str) -> tuple[dict[str, str], int]:
        """Register Parquet or CSV files (any path Spark reads) as ``view``; return types and rows.

        CSV is read with every column as text, as DuckDB's ``all_varchar``, so validation is the same.
        """
        from pyspark.errors import AnalysisException

        try:
            if fmt == "csv":
                sdf = self.spark.read.option("header", "true").csv(paths)
            else:
                sdf = self.spark.read.option("mergeSchema", "true").parquet(*paths)
        except AnalysisException as exc:
            first = str(exc).splitlines()[0]
            if "PATH_NOT_FOUND" in first or "does not exist" in first:
                raise InputError(problem="file not found", file=label, fix="check the path and the file name") from None
            raise InputError(problem=f"cannot read the file: {first}", file=label,
                             fix=f"check that it is a valid {fmt.upper()} file") from None
        sdf.createOrReplaceTempView(view)
        return _describe(sdf)


def _describe(sdf) -> tuple[dict[str, str], int]:
    """Column types (DuckDB names) and row count of a Spark DataFrame."""
    return {f.name: _duck_type(f.dataType.simpleString()) for f in sdf.schema.fields}, int(sdf.count())


def _duck_type(t: str) -> str:
    """Spark's simple type name as the DuckDB type name the validation code expects."""
    t = t.lower()
    if t.startswith("decimal"):
        return t.upper()
    return {"string": "VARCHAR", "bigint": "BIGINT", "int": "INTEGER", "smallint": "SMALLINT",
            "tinyint": "TINYINT", "double": "DOUBLE", "float": "FLOAT", "boolean": "BOOLEAN",
            "timestamp": "TIMESTAMP WITH TIME ZONE", "timestamp_ntz": "TIMESTAMP", "date": "DATE",
            "binary": "BLOB"}.get(t, t.upper())


def is_spark(con) -> bool:
    """True for a :class:`SparkConnection` (the validation and counting code takes either connection)."""
    return getattr(con, "engine", None) == "spark"


def parquet_paths(source) -> list[str]:
    """Input paths for Spark: local paths are made absolute; URIs (s3a://, hdfs://, ...) pass through."""
    items = list(source) if isinstance(source, (list, tuple)) else [source]
    out = []
    for x in items:
        s = str(x)
        out.append(s if "://" in s else str(Path(s).resolve()))
    return out
