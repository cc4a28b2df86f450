"""Cell covariates: which bins each covariate uses and how a cell is labelled."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from liftpool.data_prep.binning import Bins, frequency_bins, quantile_bins, view_history_bins
from liftpool.data_prep.rules import FREQUENCY, VIEW_HISTORY, CountingRules

__all__ = ["CellSpec", "cell_spec", "label_cells", "ALL_CELL", "MERGED_CELL", "UNEXPOSED_CELL", "SEPARATOR"]

#: Cell label when no covariates are chosen.
ALL_CELL = "all"
#: Cell label of the remainder formed by merging small cells of one campaign.
MERGED_CELL = "(merged small cells)"
#: Cell label of the unexposed arm (no stratification).
UNEXPOSED_CELL = "(all users)"
SEPARATOR = "; "


@dataclass(frozen=True)
class CellSpec:
    """For each covariate in order: its name and its bins (``None`` means categorical)."""

    covariates: tuple[tuple[str, Bins | None], ...]

    @property
    def key_names(self) -> list[str]:
        return [f"_k{i}" for i in range(len(self.covariates))]

    def sql_keys(self, columns: dict[str, str]) -> list[str]:
        """SQL expressions of the cell keys: a bin index for binned covariates, the text of a categorical."""
        out = []
        for name, bins in self.covariates:
            expr = columns[name]
            out.append(bins.sql_code(expr) if bins is not None else f"CAST({expr} AS VARCHAR)")
        return out

    def keys(self, values: dict[str, np.ndarray]) -> list[np.ndarray]:
        """The NumPy twin of :meth:`sql_keys` (categorical missing is None)."""
        out = []
        for name, bins in self.covariates:
            v = values[name]
            if bins is not None:
                out.append(bins.codes(np.asarray(v, dtype=float)))
            else:
                out.append(np.array([None if (x is None or x != x) else str(x) for x in v], dtype=object))
        return out

    def label_keys(self, keys: list[np.ndarray], n: int) -> np.ndarray:
        """Cell labels from key columns (as made by either :meth:`sql_keys` or :meth:`keys`)."""
        if not self.covariates:
            return np.full(n, ALL_CELL, dtype=object)
        out = None
        for (name, bins), k in zip(self.covariates, keys, strict=True):
            if bins is not None:
                lab = bins.label_codes(np.asarray(k, dtype=np.int64))
            else:
                lab = np.array(["missing" if (x is None or x != x) else str(x) for x in k], dtype=object)
            part = (f"{name}=" + lab.astype(str)).astype(object)
            out = part if out is None else (out + SEPARATOR + part)
        return out


def cell_spec(rules: CountingRules, numeric_values: dict[str, np.ndarray | None]) -> CellSpec:
    """The cell definition for ``rules``.

    Parameters
    ----------
    rules : CountingRules
    numeric_values : dict
        For each users-table covariate, the array of its values over the users
        table when numeric (quantile bins are computed from it), or ``None``
        when categorical.
    """
    covs = []
    for name in rules.covariates:
        if name == FREQUENCY:
            covs.append((name, frequency_bins(rules.frequency_breaks)))
        elif name == VIEW_HISTORY:
            covs.append((name, view_history_bins(rules.view_history_breaks)))
        else:
            vals = numeric_values.get(name)
            covs.append((name, None if vals is None else quantile_bins(vals, rules.numeric_bins)))
    return CellSpec(tuple(covs))


def label_cells(spec: CellSpec, df, keys: list[str]):
    """Replace the key columns ``_k0, _k1, ...`` of an aggregated table by the ``cell`` label.

    Rows whose keys give the same label are summed, so the result has one row per ``keys``.
    """
    knames = spec.key_names
    labelled = df.assign(cell=spec.label_keys([df[k].to_numpy() for k in knames], len(df))).drop(columns=knames)
    values = [c for c in labelled.columns if c not in keys]
    return labelled.groupby(keys, as_index=False, sort=False)[values].sum()
