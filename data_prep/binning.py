"""Bins for cell covariates: one definition, rendered both as SQL and applied in NumPy.

A :class:`Bins` holds increasing lower bounds ``b_0 < b_1 < ... < b_m`` and one
label per interval ``[b_j, b_{j+1})``; the last interval is open above and
values below ``b_0`` fall in the first.  Missing values get ``missing_label``.
Both engines use the same object, so their cell labels cannot drift apart.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["Bins", "frequency_bins", "view_history_bins", "quantile_bins", "format_number"]


def format_number(x: float) -> str:
    """Short, stable text for a bin edge (4 significant digits)."""
    return f"{x:.4g}"


@dataclass(frozen=True)
class Bins:
    """Intervals ``[lower[j], lower[j+1])`` with labels."""

    lower: tuple[float, ...]
    labels: tuple[str, ...]
    missing_label: str = "missing"

    def __post_init__(self) -> None:
        if len(self.lower) != len(self.labels) or not self.lower:
            raise ValueError("one label per lower bound is needed")

    def sql_code(self, expr: str) -> str:
        """A SQL CASE expression giving the bin index of ``expr`` (-1 when missing)."""
        parts = [f"CASE WHEN ({expr}) IS NULL THEN -1"]
        for j, upper in enumerate(self.lower[1:]):
            parts.append(f"WHEN ({expr}) < {float(upper)!r} THEN {j}")
        parts.append(f"ELSE {len(self.lower) - 1} END")
        return " ".join(parts)

    def codes(self, values: np.ndarray) -> np.ndarray:
        """Bin index of each value (-1 for NaN), the NumPy twin of :meth:`sql_code`."""
        values = np.asarray(values, dtype=float)
        idx = np.searchsorted(np.asarray(self.lower[1:], dtype=float), values, side="right")
        idx = np.minimum(idx, len(self.labels) - 1).astype(np.int64)
        idx[np.isnan(values)] = -1
        return idx

    def label_codes(self, codes: np.ndarray) -> np.ndarray:
        """Labels of bin indices (-1 is ``missing_label``)."""
        lab = np.asarray(list(self.labels) + [self.missing_label], dtype=object)
        c = np.asarray(codes, dtype=np.int64)
        return lab[np.where(c < 0, len(self.labels), c)]


def frequency_bins(breaks: Sequence[int]) -> Bins:
    """Impression-frequency buckets: ``1``, ``2``, ``3-4``, ``5-9``, ``10+`` for breaks 1,2,3,5,10."""
    labels = []
    for lo, hi in zip(breaks, list(breaks[1:]) + [None], strict=True):
        if hi is None:
            labels.append(f"{lo}+")
        elif hi - lo == 1:
            labels.append(f"{lo}")
        else:
            labels.append(f"{lo}-{hi - 1}")
    return Bins(tuple(float(b) for b in breaks), tuple(labels))


def view_history_bins(breaks: Sequence[float]) -> Bins:
    """Viewable-share bins ``0-0.25``, ..., ``0.75-1``; no history is ``unknown``."""
    uppers = list(breaks[1:]) + [1.0]
    labels = tuple(f"{format_number(lo)}-{format_number(hi)}" for lo, hi in zip(breaks, uppers, strict=True))
    return Bins(tuple(float(b) for b in breaks), labels, missing_label="unknown")


def quantile_bins(values: np.ndarray, n_bins: int) -> Bins:
    """Quantile bins of a numeric covariate (NumPy's linear quantiles, ties merged)."""
    v = np.asarray(values, dtype=float)
    v = v[~np.isnan(v)]
    if v.size == 0:
        return Bins((0.0,), ("all",))
    qs = np.quantile(v, np.linspace(0.0, 1.0, n_bins + 1)[:-1])
    lower = tuple(float(x) for x in np.unique(qs))
    uppers = list(lower[1:]) + [None]
    labels = tuple(
        f"{format_number(lo)}+" if hi is None else f"{format_number(lo)}-{format_number(hi)}"
        for lo, hi in zip(lower, uppers, strict=True)
    )
    return Bins(lower, labels)
