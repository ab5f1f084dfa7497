"""The validated design table and its canonical, byte-stable CSV form."""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import IngestError, Problem
from .roles import ColumnRole

ROW_COLUMN = "row"
_NUMERIC = "float64"


def column_dtype(role: ColumnRole) -> str:
    """The pandas dtype a column of this role has in :attr:`DesignTable.frame`."""
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


@dataclass(frozen=True, eq=False)
class DesignTable:
    """A validated table with a role for every column.

    Attributes
    ----------
    frame : pandas.DataFrame
        Typed columns in upload order, ignored columns dropped: factors and responses float64,
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
        kinds = [column_dtype(self.roles[c]) for c in self.frame.columns]
        columns = [self.frame[c].tolist() for c in self.frame.columns]
        for i, row in enumerate(self.frame.index):
            cells = [str(int(row))]
            for kind, values in zip(kinds, columns, strict=True):
                value = values[i]
                if value is None:
                    cells.append("")
                elif kind == _NUMERIC:
                    cells.append(repr(float(value)))
                elif kind == "int64":
                    cells.append(str(int(value)))
                else:
                    cells.append(str(value))
            writer.writerow(cells)
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
    columns: dict[str, list] = {c: [] for c in header}
    problems = []
    for number, row in enumerate(rows[1:], start=1):
        if len(row) != len(header) + 1 or row[0] != str(number):
            raise IngestError.single(f"Stored table row {number} is malformed.", row=number)
        for name, cell in zip(header, row[1:], strict=True):
            kind = column_dtype(roles[name])
            try:
                if kind == _NUMERIC:
                    value = float(cell)
                    if not np.isfinite(value):
                        raise ValueError(cell)
                elif kind == "int64":
                    value = int(cell)
                else:
                    value = cell if cell != "" else None
            except ValueError:
                problems.append(Problem(
                    f"Stored table column '{name}' row {number}: '{cell}' is not valid.",
                    row=number, column=name))
                continue
            columns[name].append(value)
    if problems:
        raise IngestError(problems)
    ordered = {c: roles[c] for c in header}
    ordered.update({c: r for c, r in roles.items() if c not in ordered})
    return design_table(typed_frame(columns, ordered, len(rows) - 1), ordered)
