"""The validated design table and its canonical, byte-stable CSV form."""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from app.analysis.coding import levels_in_order
from app.analysis.spec import Factor

from .errors import IngestError, Problem
from .roles import ColumnRole

ROW_COLUMN = "row"
_NUMERIC = "float64"


def column_dtype(role: ColumnRole) -> str:
    """The pandas dtype a column of this role has in :attr:`DesignTable.frame`."""
    if role.role == "factor" and role.kind == "categorical":
        return "object"
    if role.role in ("factor", "response"):
        return _NUMERIC
    if role.role == "run_order":
        return "int64"
    if role.role == "covariate" and role.kind == "numeric":
        return _NUMERIC
    return "object"


def typed_frame(columns: dict[str, list], roles: dict[str, ColumnRole],
                n_rows: int) -> pd.DataFrame:
    """Assemble the typed frame (index ``row`` = 1..n) from per-column value lists."""
    data = {}
    for name, values in columns.items():
        dtype = column_dtype(roles[name])
        # Text columns are kept as Python str objects with None for missing, the same on
        # pandas 2 and 3 (whose default string dtype would turn None into NaN).
        data[name] = pd.Series(values, dtype=object if dtype == "object" else dtype)
    frame = pd.DataFrame(data, columns=list(columns))
    frame.index = pd.RangeIndex(1, n_rows + 1, name=ROW_COLUMN)
    return frame


def _canonical_texts(values: np.ndarray, kind: str) -> list[str]:
    """One column's cells as canonical text: floats as ``repr``, whole numbers in decimal,
    text as it is, missing as the empty string."""
    items = values.tolist()
    if kind == _NUMERIC:
        if values.dtype == np.float64:
            # A response may be missing in a row (the run is kept; fits leave it out).
            return ["" if v != v else repr(v) for v in items]
        return ["" if v is None else repr(float(v)) for v in items]
    if kind == "int64":
        return [str(int(v)) for v in items]
    return ["" if v is None else str(v) for v in items]


@dataclass(frozen=True, eq=False)
class DesignTable:
    """A validated table with a role for every column.

    Attributes
    ----------
    frame : pandas.DataFrame
        Typed columns in upload order, ignored columns dropped: factors and responses float64
        (a categorical factor: str),
        run order int64, block str, covariates float64 (numeric) or str (categorical), label
        str or None. Index = data row number 1..n, named ``row``.
    roles : dict of str to ColumnRole
        Every column of the upload, ignored ones included.
    factors, responses, covariates : tuple of str
        Column names in upload order.
    run_order, block, label : str or None
    """

    frame: pd.DataFrame
    roles: dict[str, ColumnRole]
    factors: tuple[str, ...]
    responses: tuple[str, ...]
    run_order: str | None = None
    block: str | None = None
    covariates: tuple[str, ...] = ()
    label: str | None = None

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, DesignTable):
            return NotImplemented
        a, b = self.frame, other.frame
        return (self.roles == other.roles
                and (self.factors, self.responses, self.run_order, self.block,
                     self.covariates, self.label)
                == (other.factors, other.responses, other.run_order, other.block,
                    other.covariates, other.label)
                and list(a.columns) == list(b.columns)
                and a.index.equals(b.index) and a.index.name == b.index.name
                and list(a.dtypes) == list(b.dtypes)
                and a.equals(b))

    __hash__ = None  # a DataFrame field makes the table unhashable

    def analysis_factors(self) -> tuple[Factor, ...]:
        """The factors as the analysis takes them, in upload order: declared low and high, or
        a categorical factor's levels in the order they first appear in the table."""
        return tuple(
            Factor(name, self.roles[name].low, self.roles[name].high, self.roles[name].units,
                   levels=levels_in_order(self.frame[name])
                   if self.roles[name].categorical_factor else None)
            for name in self.factors)

    @property
    def n_runs(self) -> int:
        """Number of rows (runs)."""
        return len(self.frame)

    def to_canonical_csv(self) -> bytes:
        """Deterministic UTF-8 CSV: ``row`` first, then the frame's columns.

        Comma delimiter, ``"\\n"`` line ends, minimal quoting, ``.`` decimal mark, floats as
        ``repr`` (the shortest text that reads back to the same double), missing labels as
        empty fields. With :meth:`roles_json` it reloads exactly through
        :func:`load_canonical` (round-trip tests in ``tests/ingest``).
        """
        out = io.StringIO(newline="")
        writer = csv.writer(out, lineterminator="\n", quoting=csv.QUOTE_MINIMAL)
        writer.writerow([ROW_COLUMN, *self.frame.columns])
        columns = [_canonical_texts(self.frame.index.to_numpy(), "int64")]
        columns += [_canonical_texts(self.frame[c].to_numpy(), column_dtype(self.roles[c]))
                    for c in self.frame.columns]
        writer.writerows(zip(*columns, strict=True))
        return out.getvalue().encode("utf-8")

    def roles_json(self) -> str:
        """Deterministic JSON object of every column's role (sorted keys, compact)."""
        return json.dumps({name: role.to_dict() for name, role in self.roles.items()},
                          sort_keys=True, ensure_ascii=False, separators=(",", ":"),
                          allow_nan=False)


def design_table(frame: pd.DataFrame, roles: dict[str, ColumnRole]) -> DesignTable:
    """Build a :class:`DesignTable`, deriving the role tuples from ``frame``'s column order."""
    def named(role: str) -> tuple[str, ...]:
        return tuple(c for c in frame.columns if roles[c].role == role)

    def single(role: str) -> str | None:
        found = named(role)
        return found[0] if found else None

    return DesignTable(frame=frame, roles=dict(roles), factors=named("factor"),
                       responses=named("response"), run_order=single("run_order"),
                       block=single("block"), covariates=named("covariate"),
                       label=single("label"))


def _stored_values(cells: tuple[str, ...], kind: str, gaps: bool = False) -> list:
    """One stored column back to values, as a whole; ValueError when any cell is not valid.
    With ``gaps`` (responses), an empty cell is a missing value (NaN)."""
    if kind == _NUMERIC:
        empty = np.asarray([gaps and c == "" for c in cells], dtype=bool)
        filled = tuple("nan" if e else c for c, e in zip(cells, empty, strict=True))
        values = np.asarray(filled, dtype=object).astype(np.float64)  # float() of each cell
        if not (np.isfinite(values) | empty).all():
            raise ValueError("not finite")
        return values
    if kind == "int64":
        return list(map(int, cells))
    return [cell if cell != "" else None for cell in cells]


def _stored_problems(header: list[str], body: list[list[str]],
                     roles: dict[str, ColumnRole]) -> list[Problem]:
    """Every stored cell that is not what its role requires, row by row."""
    problems = []
    for number, row in enumerate(body, start=1):
        for name, cell in zip(header, row[1:], strict=True):
            try:
                _stored_values((cell,), column_dtype(roles[name]),
                               gaps=roles[name].role == "response")
            except ValueError:
                problems.append(Problem(
                    f"Stored table column '{name}' row {number}: '{cell}' is not valid.",
                    row=number, column=name))
    return problems


def load_canonical(csv_bytes: bytes, roles_json: str) -> DesignTable:
    """Rebuild the :class:`DesignTable` written by ``to_canonical_csv`` and ``roles_json``.

    Raises
    ------
    IngestError
        The two do not belong together, or a cell is not what its role requires (names the row
        and column). Stored versions are hashed, so this signals damage, not user error.
    """
    try:
        raw_roles = json.loads(roles_json)
        text = csv_bytes.decode("utf-8")
    except (ValueError, UnicodeDecodeError) as err:
        raise IngestError.single(f"The stored table cannot be read: {err}.") from None
    if not isinstance(raw_roles, dict):
        raise IngestError.single("The stored roles are not a JSON object.")
    roles = {name: ColumnRole.from_dict(d) for name, d in raw_roles.items()}
    rows = list(csv.reader(io.StringIO(text, newline="")))
    if not rows or rows[0][:1] != [ROW_COLUMN]:
        raise IngestError.single("The stored table does not start with a 'row' column.")
    header = rows[0][1:]
    kept = [c for c, r in roles.items() if r.role != "ignore"]
    if sorted(header) != sorted(kept) or len(set(header)) != len(header):
        raise IngestError.single(
            "The stored table's columns do not match its roles: "
            f"table has {header}, roles expect {kept}.")
    body = rows[1:]
    numbers = list(map(str, range(1, len(body) + 1)))
    if set(map(len, body)) - {len(header) + 1} or [row[0] for row in body] != numbers:
        for number, row in zip(numbers, body, strict=True):
            if len(row) != len(header) + 1 or row[0] != number:
                raise IngestError.single(f"Stored table row {number} is malformed.",
                                         row=int(number))
    cells = list(zip(*body, strict=True)) if body else [()] * (len(header) + 1)
    try:
        columns = {name: _stored_values(column, column_dtype(roles[name]),
                                        gaps=roles[name].role == "response")
                   for name, column in zip(header, cells[1:], strict=True)}
    except ValueError:
        raise IngestError(_stored_problems(header, body, roles)) from None
    ordered = {c: roles[c] for c in header}
    ordered.update({c: r for c, r in roles.items() if c not in ordered})
    return design_table(typed_frame(columns, ordered, len(rows) - 1), ordered)
