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
