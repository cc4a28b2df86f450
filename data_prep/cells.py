"""Cell covariates: which bins each covariate uses and how a cell is labelled."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from liftpool.data_prep.binning import Bins, frequency_bins, quantile_bins, view_history_bins
from liftpool.data_prep.rules import FREQUENCY, VIEW_HISTORY, CountingRules

__all__ = ["CellSpec", "cell_spec", "ALL_CELL", "MERGED_CELL", "UNEXPOSED_CELL", "SEPARATOR"]

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

    def sql(self, columns: dict[str, str]) -> str:
        """SQL text expression for the cell label; ``columns`` maps covariate to SQL expression."""
        if not self.covariates:
            return f"'{ALL_CELL}'"
        parts = []
        for name, bins in self.covariates:
            expr = columns[name]
            lab = bins.sql(expr) if bins is not None else f"COALESCE(CAST({expr} AS VARCHAR), 'missing')"
            parts.append(f"'{name}=' || ({lab})")
        return f" || '{SEPARATOR}' || ".join(parts)

    def labels(self, values: dict[str, np.ndarray], n: int) -> np.ndarray:
        """Cell labels for arrays of covariate values (NaN / None are missing)."""
        if not self.covariates:
            return np.full(n, ALL_CELL, dtype=object)
        out = None
        for name, bins in self.covariates:
            v = values[name]
            if bins is not None:
                lab = bins.apply(np.asarray(v, dtype=float))
            else:
                lab = np.array(["missing" if (x is None or x != x) else str(x) for x in v], dtype=object)
            part = np.char.add(f"{name}=", lab.astype(str)).astype(object)
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
