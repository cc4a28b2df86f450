"""Shared fixtures.  Tests import the installed package (``liftpool.*``), never the source folders."""

from __future__ import annotations

import os

import pandas as pd
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session")
def small_scenario(tmp_path_factory):
    """The invented demo scenario at 8% scale, written as Parquet (invented data: simulations only)."""
    from liftpool.data_prep import write_scenario

    folder = tmp_path_factory.mktemp("scenario")
    paths = write_scenario(folder, seed=7, scale=0.08)
    return paths


def write_csvs(folder, **tables: pd.DataFrame) -> dict:
    """Write DataFrames as CSV files named after their keyword; return the paths."""
    paths = {}
    for name, df in tables.items():
        p = folder / f"{name}.csv"
        df.to_csv(p, index=False)
        paths[name] = p
    return paths


def _spark_ready() -> tuple[bool, str]:
    import shutil

    from liftpool.data_prep.engine_spark import spark_available

    if not spark_available():
        return False, "pyspark/sqlglot not installed (pip install 'liftpool[spark]')"
    if shutil.which("java") is None:
        return False, "no Java runtime (apt install default-jre-headless)"
    return True, ""


SPARK_READY, SPARK_REASON = _spark_ready()
if not SPARK_READY and os.environ.get("LIFTPOOL_REQUIRE_SPARK") == "1":
    raise RuntimeError(f"LIFTPOOL_REQUIRE_SPARK=1 but Spark cannot run: {SPARK_REASON}")
#: Mark for tests that run Spark in local mode (they skip, with the reason, where Spark cannot run;
#: CI sets LIFTPOOL_REQUIRE_SPARK=1 so that they never skip there).
#: Skipped where Spark cannot start; slow where it can (a JVM per session, seconds per query).
needs_spark = [pytest.mark.skipif(not SPARK_READY, reason=SPARK_REASON), pytest.mark.slow]
_SPARK = {}


def spark_for_tests():
    """One local[2] Spark session for the whole test run."""
    if "s" not in _SPARK:
        from liftpool.data_prep.engine_spark import spark_session

        _SPARK["s"] = spark_session("local[2]", app_name="liftpool-tests")
    return _SPARK["s"]
