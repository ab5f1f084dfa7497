"""Check a raw table against the roles the user confirmed, and type its columns."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from app.analysis.terms import factor_name_problem

from .canonical import DesignTable, design_table, typed_frame
from .errors import CELLS_LISTED_PER_COLUMN, IngestError, Problem, format_rows
from .raw import RawTable
from .roles import SINGLE_ROLES, ColumnRole

# Run order is a count of runs; beyond this a "whole number" from a float is no longer exact.
_MAX_RUN_ORDER = 2**53
_ROLE_WORDS = {"factor": "factor", "response": "response", "run_order": "run order",
               "block": "block", "covariate": "covariate", "label": "label"}


def _fmt(value: float) -> str:
    return f"{value:g}" if math.isclose(value, float(f"{value:g}")) else repr(value)


def _rows(raw: RawTable, where: np.ndarray) -> list[int]:
    """Row numbers (as int) of the cells where the mask is true."""
    return raw.frame.index.to_numpy()[where].tolist()


def _numeric_column(raw: RawTable, column: str, role: str, problems: list[Problem],
                    *, missing_note: str = "", gaps_allowed: bool = False) -> np.ndarray:
    """Parse a column of numbers, adding a problem for the first few bad cells and the gaps
    (with ``gaps_allowed``, only for a column with no value at all).

    Returns the float64 values, NaN where a cell is missing or not a number.
    """
    cells = raw.frame[column].to_numpy(dtype=object)
    values = raw.numbers(column)
    missing_mask = raw.missing(column)
    bad = np.flatnonzero(np.isnan(values) & ~missing_mask)
    word = _ROLE_WORDS[role]
    for i in bad[:CELLS_LISTED_PER_COLUMN].tolist():
        row = int(raw.frame.index[i])
        problems.append(Problem(
            f"Column '{column}' ({word}) row {row}: '{cells[i]}' is not a number"
            + (" (this file uses a decimal comma)" if raw.decimal == "," else "") + ".",
            row=row, column=column))
    if len(bad) > CELLS_LISTED_PER_COLUMN:
        problems.append(Problem(
            f"Column '{column}' ({word}) has {len(bad) - CELLS_LISTED_PER_COLUMN} more cells "
            "that are not numbers.", column=column))
    missing = _rows(raw, missing_mask)
    if missing and gaps_allowed and len(missing) < len(cells):
        return values
    if missing:
        problems.append(Problem(
            f"Column '{column}' ({word}) has no value in row{'s' if len(missing) > 1 else ''} "
            f"{format_rows(missing)}.{missing_note}", row=missing[0], column=column))
    return values


def _text_column(raw: RawTable, column: str, role: str, problems: list[Problem],
                 *, required: bool) -> np.ndarray:
    values = raw.frame[column].to_numpy(dtype=object)
    if required:
        missing = _rows(raw, raw.missing(column))
        if missing:
            problems.append(Problem(
                f"Column '{column}' ({_ROLE_WORDS[role]}) has no value in "
                f"row{'s' if len(missing) > 1 else ''} {format_rows(missing)}.",
                row=missing[0], column=column))
    return values


def _distinct_count(values: np.ndarray) -> int:
    return len({v for v in pd.unique(values) if v is not None})


def _categorical_factor(raw: RawTable, column: str, problems: list[Problem]) -> np.ndarray:
    """A factor whose levels are names: text with no gaps and at least two distinct levels.

    Cells are kept as the text uploaded (no number parsing), so "A", "B" and "1", "2" alike are
    level names; the analysis orders levels by first appearance in the file.
    """
    values = _text_column(raw, column, "factor", problems, required=True)
    present = [v for v in pd.unique(values) if v is not None and not pd.isna(v)]
    if len(present) == 1:
        problems.append(Problem(
            f"Factor '{column}' (categorical) has one level only ('{present[0]}'); a categorical "
            "factor needs at least two levels. Mark it 'ignore'.", column=column))
    return values


def _listed(rows: list[int], values: np.ndarray) -> str:
    return ", ".join(f"row {r} has {_fmt(float(v))}"
                     for r, v in zip(rows[:CELLS_LISTED_PER_COLUMN],
                                     values[:CELLS_LISTED_PER_COLUMN].tolist(), strict=False))


def _run_order(raw: RawTable, column: str, problems: list[Problem]) -> np.ndarray:
    numbers = _numeric_column(raw, column, "run_order", problems)
    present = ~np.isnan(numbers)
    with np.errstate(invalid="ignore"):
        not_whole = present & ((np.floor(numbers) != numbers) | (numbers > _MAX_RUN_ORDER))
        not_positive = present & ~not_whole & (numbers < 1)
    good = present & ~not_whole & ~not_positive
    if not_whole.any():
        rows = _rows(raw, not_whole)
        problems.append(Problem(
            f"Run order '{column}' must be whole numbers: {_listed(rows, numbers[not_whole])}.",
            row=rows[0], column=column))
    if not_positive.any():
        rows = _rows(raw, not_positive)
        problems.append(Problem(
            f"Run order '{column}' must be 1 or more: {_listed(rows, numbers[not_positive])}.",
            row=rows[0], column=column))
    orders = np.where(good, numbers, 0).astype(np.int64)
    _repeated_orders(raw, column, orders, good, problems)
    return orders if good.all() else np.where(good, orders, None).astype(object)


def _repeated_orders(raw: RawTable, column: str, orders: np.ndarray, good: np.ndarray,
                     problems: list[Problem]) -> None:
    """Add a problem for each of the first few run-order numbers used in more than one row."""
    distinct, counts = np.unique(orders[good], return_counts=True)
    repeats = distinct[counts > 1].tolist()
    for order in repeats[:CELLS_LISTED_PER_COLUMN]:
        rows = _rows(raw, good & (orders == order))
        problems.append(Problem(
            f"Run order {order} appears in rows {format_rows(rows)} of '{column}'; each run "
            "needs its own place in the order.", row=rows[1], column=column))
    if len(repeats) > CELLS_LISTED_PER_COLUMN:
        problems.append(Problem(
            f"Run order '{column}' repeats {len(repeats) - CELLS_LISTED_PER_COLUMN} more "
            "numbers.", column=column))


def _all_numbers(raw: RawTable, column: str) -> bool:
    """True when every filled cell of the column is a number."""
    return not (np.isnan(raw.numbers(column)) & ~raw.missing(column)).any()


def _check_roles(raw: RawTable, roles: dict[str, ColumnRole]) -> list[Problem]:
    problems = []
    for name, role in roles.items():
        if not isinstance(role, ColumnRole):
            problems.append(Problem(f"The role given for column '{name}' is not a column role.",
                                    column=name))
        elif name not in raw.frame.columns:
            problems.append(Problem(f"Roles name column '{name}' which is not in the file.",
                                    column=name))
    if problems:
        return problems
    for role, word in SINGLE_ROLES.items():
        named = [c for c, r in roles.items() if r.role == role and c in raw.frame.columns]
        if len(named) > 1:
            listed = " and ".join(f"'{c}'" for c in named)
            problems.append(Problem(f"Only one column can be the {word}; {listed} both are.",
                                    column=named[1]))
    if not any(r.role == "factor" for r in roles.values()) or not any(
            r.role == "response" for r in roles.values()):
        problems.append(Problem("At least one factor and one response are needed."))
    for name, role in roles.items():
        if role.role != "factor":
            continue
        name_problem = factor_name_problem(name)
        if name_problem:
            problems.append(Problem(f"Factor '{name}': {name_problem}.", column=name))
        if (role.low is None) != (role.high is None):
            problems.append(Problem(
                f"Factor '{name}': give both low and high levels, or neither when the column "
                "already holds coded values.", column=name))
        elif role.low is not None and not (math.isfinite(role.low) and math.isfinite(role.high)):
            problems.append(Problem(f"Factor '{name}': low and high must be finite numbers.",
                                    column=name))
        elif role.low is not None and role.low >= role.high:
            problems.append(Problem(
                f"Factor '{name}': a factor needs low < high (low {_fmt(role.low)}, "
                f"high {_fmt(role.high)}).", column=name))
    return problems


def validate(raw: RawTable, roles: dict[str, ColumnRole]) -> DesignTable:
    """Check every cell against its column's role and return the typed :class:`DesignTable`.

    Columns without a role are treated as ignored. Every problem found is reported together,
    the first five per column listed by row. The rules: factors and responses are numbers with
    no gaps (with several responses, every one needs a value in every row), except that a
    categorical factor is text with no gaps and at least two levels; a factor is not
    constant, its declared low < high, and its name has no ':' or '^' and is not
    'Intercept' (term names would be ambiguous); run order is whole, positive and unique; block,
    categorical covariates and numeric covariates have no gaps; the run count reaches the
    main-effects model (1 + factors + blocks - 1, a categorical factor counting
    its levels - 1). Verified by the bad-input tests in
    ``tests/ingest``.

    Raises
    ------
    IngestError
        With all problems, each naming its row, column or field.
    """
    problems = _check_roles(raw, roles)
    if problems:
        raise IngestError(problems)
    full = {c: roles.get(c, ColumnRole("ignore")) for c in raw.frame.columns}
    response_note = " A response needs a value in at least one row."
    columns: dict[str, np.ndarray] = {}
    for name, role in full.items():
        if role.role == "ignore":
            continue
        if role.categorical_factor:
            values = _categorical_factor(raw, name, problems)
        elif role.role == "factor":
            values = _numeric_column(raw, name, "factor", problems)
            if len(values) and not np.isnan(values).any() and (values == values[0]).all():
                problems.append(Problem(
                    f"Factor '{name}' is constant (every row is {_fmt(float(values[0]))}); a "
                    "factor must vary to be estimated. Mark it 'ignore'.", column=name))
        elif role.role == "response":
            # A run whose response is missing stays in the data: a fit of that response must
            # leave it out with a reason (app.workflow.fits).
            values = _numeric_column(raw, name, "response", problems, missing_note=response_note,
                                     gaps_allowed=True)
        elif role.role == "run_order":
            values = _run_order(raw, name, problems)
        elif role.role == "covariate":
            kind = role.kind or ("numeric" if _all_numbers(raw, name) else "categorical")
            full[name] = role = ColumnRole("covariate", units=role.units, kind=kind)
            if kind == "numeric":
                values = _numeric_column(raw, name, "covariate", problems)
            else:
                values = _text_column(raw, name, "covariate", problems, required=True)
        else:  # block (required) or label (may be blank)
            values = _text_column(raw, name, role.role, problems,
                                  required=role.role == "block")
        columns[name] = values
    n = raw.n_rows
    # a categorical factor with L levels takes L - 1 columns of the main-effects model
    factors = sum(_distinct_count(columns[c]) - 1 if r.categorical_factor else 1
                  for c, r in full.items() if r.role == "factor")
    block = next((c for c, r in full.items() if r.role == "block"), None)
    blocks = _distinct_count(columns[block]) if block else 1
    needed = 1 + factors + max(blocks - 1, 0)
    if n < needed:
        extra = f" and {blocks - 1} for blocks" if blocks > 1 else ""
        problems.append(Problem(
            f"{n} run{'s are' if n != 1 else ' is'} fewer than the {needed} a main-effects model "
            f"needs (1 for the mean, {factors} for the factors{extra})."))
    if problems:
        raise IngestError(problems)
    return design_table(typed_frame(columns, full, n), full)
