"""Check a raw table against the roles the user confirmed, and type its columns."""

from __future__ import annotations

import math

from app.analysis.terms import factor_name_problem

from .canonical import DesignTable, design_table, typed_frame
from .errors import CELLS_LISTED_PER_COLUMN, IngestError, Problem, format_rows
from .raw import RawTable, parse_numbers
from .roles import ColumnRole

# Run order is a count of runs; beyond this a "whole number" from a float is no longer exact.
_MAX_RUN_ORDER = 2**53
_SINGLE_ROLES = {"run_order": "run order", "block": "block", "label": "label"}
_ROLE_WORDS = {"factor": "factor", "response": "response", "run_order": "run order",
               "block": "block", "covariate": "covariate", "label": "label"}


def _fmt(value: float) -> str:
    return f"{value:g}" if math.isclose(value, float(f"{value:g}")) else repr(value)


def _cells(raw: RawTable, column: str) -> list[tuple[int, str | None]]:
    return list(zip(raw.frame.index.tolist(), raw.frame[column].tolist(), strict=True))


def _numeric_column(raw: RawTable, column: str, role: str, problems: list[Problem],
                    *, missing_note: str = "") -> list[float | None]:
    """Parse a column of numbers, adding a problem for the first few bad cells and the gaps."""
    values: list[float | None] = []
    bad: list[tuple[int, str]] = []
    missing: list[int] = []
    cells = raw.frame[column].tolist()
    for row, cell, value in zip(raw.frame.index.tolist(), cells,
                                parse_numbers(cells, raw.decimal), strict=True):
        if cell is None:
            missing.append(row)
        elif value is None:
            bad.append((row, cell))
        values.append(value)
    word = _ROLE_WORDS[role]
    for row, cell in bad[:CELLS_LISTED_PER_COLUMN]:
        problems.append(Problem(
            f"Column '{column}' ({word}) row {row}: '{cell}' is not a number"
            + (" (this file uses a decimal comma)" if raw.decimal == "," else "") + ".",
            row=row, column=column))
    if len(bad) > CELLS_LISTED_PER_COLUMN:
        problems.append(Problem(
            f"Column '{column}' ({word}) has {len(bad) - CELLS_LISTED_PER_COLUMN} more cells "
            "that are not numbers.", column=column))
    if missing:
        problems.append(Problem(
            f"Column '{column}' ({word}) has no value in row{'s' if len(missing) > 1 else ''} "
            f"{format_rows(missing)}.{missing_note}", row=missing[0], column=column))
    return values


def _text_column(raw: RawTable, column: str, role: str, problems: list[Problem],
                 *, required: bool) -> list[str | None]:
    values = [cell for _, cell in _cells(raw, column)]
    missing = [row for row, cell in _cells(raw, column) if cell is None]
    if required and missing:
        problems.append(Problem(
            f"Column '{column}' ({_ROLE_WORDS[role]}) has no value in "
            f"row{'s' if len(missing) > 1 else ''} {format_rows(missing)}.",
            row=missing[0], column=column))
    return values


def _run_order(raw: RawTable, column: str, problems: list[Problem]) -> list[int | None]:
    numbers = _numeric_column(raw, column, "run_order", problems)
    orders: list[int | None] = []
    not_whole: list[tuple[int, float]] = []
    not_positive: list[tuple[int, float]] = []
    for row, value in zip(raw.frame.index.tolist(), numbers, strict=True):
        if value is None:
            orders.append(None)
        elif not value.is_integer() or value > _MAX_RUN_ORDER:
            not_whole.append((row, value))
            orders.append(None)
        elif value < 1:
            not_positive.append((row, value))
            orders.append(None)
        else:
            orders.append(int(value))
    if not_whole:
        listed = ", ".join(f"row {r} has {_fmt(v)}" for r, v in not_whole[:CELLS_LISTED_PER_COLUMN])
        problems.append(Problem(f"Run order '{column}' must be whole numbers: {listed}.",
                                row=not_whole[0][0], column=column))
    if not_positive:
        listed = ", ".join(f"row {r} has {_fmt(v)}"
                           for r, v in not_positive[:CELLS_LISTED_PER_COLUMN])
        problems.append(Problem(f"Run order '{column}' must be 1 or more: {listed}.",
                                row=not_positive[0][0], column=column))
    rows_by_order: dict[int, list[int]] = {}
    for row, order in zip(raw.frame.index.tolist(), orders, strict=True):
        if order is not None:
            rows_by_order.setdefault(order, []).append(row)
    repeats = [(o, rows) for o, rows in sorted(rows_by_order.items()) if len(rows) > 1]
    for order, rows in repeats[:CELLS_LISTED_PER_COLUMN]:
        problems.append(Problem(
            f"Run order {order} appears in rows {format_rows(rows)} of '{column}'; each run "
            "needs its own place in the order.", row=rows[1], column=column))
    if len(repeats) > CELLS_LISTED_PER_COLUMN:
        problems.append(Problem(
            f"Run order '{column}' repeats {len(repeats) - CELLS_LISTED_PER_COLUMN} more "
            "numbers.", column=column))
    return orders


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
    for role, word in _SINGLE_ROLES.items():
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
    no gaps (with several responses, every one needs a value in every row); a factor is not
    constant, its declared low < high, and its name has no ':' or '^' and is not
    'Intercept' (term names would be ambiguous); run order is whole, positive and unique; block,
    categorical covariates and numeric covariates have no gaps; the run count reaches the
    main-effects model (1 + factors + blocks - 1). Verified by the bad-input tests in
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
    several = sum(1 for r in full.values() if r.role == "response") > 1
    response_note = (" Every response needs a value in every row; mark a column 'ignore' to "
                     "leave it out." if several else "")
    columns: dict[str, list] = {}
    for name, role in full.items():
        if role.role == "ignore":
            continue
        if role.role == "factor":
            values = _numeric_column(raw, name, "factor", problems)
            present = [v for v in values if v is not None]
            if present and len(set(present)) == 1 and len(present) == len(values):
                problems.append(Problem(
                    f"Factor '{name}' is constant (every row is {_fmt(present[0])}); a factor "
                    "must vary to be estimated. Mark it 'ignore'.", column=name))
        elif role.role == "response":
            values = _numeric_column(raw, name, "response", problems, missing_note=response_note)
        elif role.role == "run_order":
            values = _run_order(raw, name, problems)
        elif role.role == "covariate":
            cells = raw.frame[name].tolist()
            kind = role.kind or ("numeric" if all(
                v is not None for c, v in zip(cells, parse_numbers(cells, raw.decimal),
                                              strict=True) if c is not None)
                else "categorical")
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
    factors = sum(1 for r in full.values() if r.role == "factor")
    block = next((c for c, r in full.items() if r.role == "block"), None)
    blocks = len({v for v in columns[block] if v is not None}) if block else 1
    needed = 1 + factors + max(blocks - 1, 0)
    if n < needed:
        extra = f" and {blocks - 1} for blocks" if blocks > 1 else ""
        problems.append(Problem(
            f"{n} run{'s are' if n != 1 else ' is'} fewer than the {needed} a main-effects model "
            f"needs (1 for the mean, {factors} for the factors{extra})."))
    if problems:
        raise IngestError(problems)
    return design_table(typed_frame(columns, full, n), full)
