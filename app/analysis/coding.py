"""Coding factors: x = (value - centre) / half-range from the declared low and high levels."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .spec import AnalysisError, Factor


def centre_and_half_range(factor: Factor) -> tuple[float, float]:
    """(centre, half-range) of a factor; (0, 1) for an already coded column."""
    if factor.coded:
        return 0.0, 1.0
    low, high = float(factor.low), float(factor.high)
    return (low + high) / 2.0, (high - low) / 2.0


def numeric_column(frame: pd.DataFrame, name: str, role: str) -> np.ndarray:
    """A column as float, with an error naming the column and the first bad row."""
    if name not in frame.columns:
        raise AnalysisError(f"Column '{name}' ({role}) is not in the table")
    values = pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        row = frame.index[int(np.argmax(bad))]
        raise AnalysisError(f"Column '{name}' ({role}) row {row}: no numeric value")
    return values


def code_factors(frame: pd.DataFrame, factors: tuple[Factor, ...]) -> np.ndarray:
    """The n x k matrix of coded factor values (cube points at ±1)."""
    cols = []
    for f in factors:
        values = numeric_column(frame, f.name, "factor")
        centre, half = centre_and_half_range(f)
        cols.append((values - centre) / half)
    return np.column_stack(cols) if cols else np.zeros((len(frame), 0))


def decode(coded: np.ndarray, factors: tuple[Factor, ...]) -> np.ndarray:
    """Inverse of :func:`code_factors` for one or more rows."""
    coded = np.atleast_2d(np.asarray(coded, dtype=float))
    out = np.empty_like(coded)
    for j, f in enumerate(factors):
        centre, half = centre_and_half_range(f)
        out[:, j] = centre + half * coded[:, j]
    return out
