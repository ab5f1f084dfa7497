"""Coding factors: x = (value - centre) / half-range from the declared low and high levels.

A categorical factor's coded column holds each run's level number (1 for its first level, in
the order of :attr:`Factor.levels`); the model uses it through :func:`effect_columns`, the one
place where sum-to-zero (effect) coding is done, for categorical factors and blocks alike.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .spec import AnalysisError, Factor


def centre_and_half_range(factor: Factor) -> tuple[float, float]:
    """(centre, half-range) of a factor; (0, 1) for an already coded column and for a
    categorical factor (its level number is kept as it is)."""
    if factor.low is None:
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


def levels_in_order(values) -> tuple[str, ...]:
    """Distinct level names in order of first appearance (missing cells skipped)."""
    return tuple(str(v) for v in pd.unique(pd.Series(values, dtype=object).dropna()))


def level_numbers(frame: pd.DataFrame, factor: Factor) -> np.ndarray:
    """Each run's level number (1..L) of a categorical factor, as float.

    Raises naming the column and the first row whose cell is missing or not one of the levels.
    """
    if factor.name not in frame.columns:
        raise AnalysisError(f"Column '{factor.name}' (factor) is not in the table")
    cells = pd.Series(frame[factor.name].to_numpy(dtype=object))
    numbers = cells.map({name: i + 1 for i, name in enumerate(factor.levels)}).to_numpy(
        dtype=float, na_value=np.nan)
    bad = np.isnan(numbers)
    if bad.any():
        i = int(np.argmax(bad))
        raise AnalysisError(f"Column '{factor.name}' (factor) row {frame.index[i]}: "
                            f"'{cells.iloc[i]}' is not one of its levels "
                            f"({', '.join(factor.levels)})")
    return numbers


def effect_columns(numbers: np.ndarray, n_levels: int) -> np.ndarray:
    """Sum-to-zero (effect) columns of a factor from its level numbers 1..L: n x (L - 1).

    Column j is 1 at level j + 1, -1 at the last level and 0 elsewhere, so every column sums to
    zero over a balanced design, a coefficient is its level's departure from the average over
    levels, and a row of zeros is that average (what predictions over blocks use).
    """
    numbers = np.asarray(numbers)
    cols = (numbers[:, None] == np.arange(1, n_levels)[None, :]).astype(float)
    cols[numbers == n_levels, :] = -1.0
    return cols


def code_factors(frame: pd.DataFrame, factors: tuple[Factor, ...]) -> np.ndarray:
    """The n x k matrix of coded factor values (cube points at ±1; level numbers for a
    categorical factor)."""
    cols = []
    for f in factors:
        if f.categorical:
            cols.append(level_numbers(frame, f))
            continue
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
