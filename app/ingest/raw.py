"""The table as the file held it, before anyone has said what the columns mean."""

from __future__ import annotations

import re
from dataclasses import dataclass

import pandas as pd

from .errors import IngestError, Problem, format_rows

# A plain decimal number: optional sign, digits with an optional fraction, optional exponent.
# Deliberately narrower than float(): "nan", "inf", "1_000" and hex are not measurements.
_NUMBER_POINT = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_NUMBER_COMMA = re.compile(r"[+-]?(?:\d+(?:,\d*)?|,\d+)(?:[eE][+-]?\d+)?")


def parse_number(text: str, decimal: str = ".") -> float | None:
    """Read one cell as a finite float, or return None when it is not a plain number.

    Parameters
    ----------
    text : str
        The stripped cell text.
    decimal : {".", ","}
        The file's decimal mark.

    Notes
    -----
    Verified by the unit tests in ``tests/ingest`` (decimal comma, exponents, rejected words).
    """
    pattern = _NUMBER_COMMA if decimal == "," else _NUMBER_POINT
    if not pattern.fullmatch(text):
        return None
    value = float(text.replace(",", ".") if decimal == "," else text)
    if value != value or value in (float("inf"), float("-inf")):
        return None  # an exponent such as 1e999 overflows to inf
    return value


def parse_numbers(cells: list[str | None], decimal: str = ".") -> list[float | None]:
    """:func:`parse_number` over a column (None stays None), parsing each distinct text once."""
    seen: dict[str, float | None] = {}
    out = []
    for cell in cells:
        if cell is None:
            out.append(None)
            continue
        if cell not in seen:
            seen[cell] = parse_number(cell, decimal)
        out.append(seen[cell])
    return out


def looks_numeric(text: str) -> bool:
    """True when the text reads as a number with either decimal mark."""
    return parse_number(text, ".") is not None or parse_number(text, ",") is not None


@dataclass(frozen=True, eq=False)
class RawTable:
    """What the file held, before roles.

    Attributes
    ----------
    frame : pandas.DataFrame
        Every cell as ``str`` (``None`` for empty), object dtype; columns are the header names;
        index = data row numbers 1..n, named ``row``.
    file_kind : {"csv", "xlsx"}
    encoding : str or None
        ``"utf-8"``, ``"utf-8-sig"`` or ``"latin-1"`` for CSV; None for XLSX.
    delimiter : str or None
        ``","``, ``";"`` or ``"\\t"`` for CSV; None for XLSX.
    decimal : {".", ","}
    sheet : str or None
        The worksheet read (XLSX).
    sheets : tuple of str
        Every worksheet name (XLSX); ``()`` for CSV.
    """

    frame: pd.DataFrame
    file_kind: str
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str = "."
    sheet: str | None = None
    sheets: tuple[str, ...] = ()

    @property
    def n_rows(self) -> int:
        """Number of data rows."""
        return len(self.frame)


def clean_cell(value: str | None) -> str | None:
    """Strip whitespace; an empty string becomes None."""
    if value is None:
        return None
    value = value.strip()
    return value or None


def build_frame(header: list[str | None], rows: list[list[str | None]],
                where: str) -> pd.DataFrame:
    """Check the header and assemble the object-dtype frame with index 1..n.

    Parameters
    ----------
    header : list
        First row of the table, cells already cleaned.
    rows : list of list
        Data rows, cells already cleaned, each padded or cut to the header width.
    where : str
        How messages name the place, e.g. ``"The file"`` or ``"Sheet 'Runs'"``.

    Raises
    ------
    IngestError
        No header row, an unnamed or number-like column name, or duplicate names.
    """
    problems: list[Problem] = []
    _require_header(header, where)
    for position, name in enumerate(header, start=1):
        if name is not None and looks_numeric(name):
            problems.append(Problem(
                f"Header row: column {position} is named '{name}', which looks like a number; "
                "the first row must name every column.", column=name))
    seen: dict[str, int] = {}
    for position, name in enumerate(header, start=1):
        if name is None:
            continue
        key = name.casefold()
        if key in seen:
            first = seen[key]
            first_name = header[first - 1]
            same = "both named" if first_name == name else "named alike"
            problems.append(Problem(
                f"Columns {first} and {position} are {same} ('{first_name}' and '{name}'); "
                "each column needs its own name.", column=name))
        else:
            seen[key] = position
    if problems:
        raise IngestError(problems)
    if not rows:
        raise IngestError.single(f"{where} has a header row but no data rows.")
    frame = pd.DataFrame(rows, columns=header, dtype=object)
    frame.index = pd.RangeIndex(1, len(rows) + 1, name="row")
    return frame


def _require_header(header: list[str | None], where: str) -> None:
    named = [h for h in header if h is not None]
    if named and all(looks_numeric(h) for h in named):
        raise IngestError.single(
            f"{where} has no header row: the first row holds only numbers "
            f"({', '.join(named[:3])}{' …' if len(named) > 3 else ''}). "
            "Add a first row that names every column.")


def trim_table(table: list[list[str | None]]) -> list[list[str | None]]:
    """Drop trailing empty rows, and trailing columns that are empty in every row.

    Spreadsheet exports often carry formatted but empty cells at the edges; they are not data.
    Empty rows inside the table are kept so that row numbers match the file.
    """
    while table and all(cell is None for cell in table[-1]):
        table.pop()
    width = max((len(r) for r in table), default=0)
    while width and all(len(r) < width or r[width - 1] is None for r in table):
        width -= 1
    return [(r + [None] * (width - len(r)))[:width] for r in table]


def split_header(table: list[list[str | None]], where: str) -> pd.DataFrame:
    """Take the first row as the header and build the frame.

    A column with no name and no values (a spacer, or an export's stray delimiter) is dropped;
    a column with values but no name is a problem.
    """
    table = trim_table(table)
    if not table:
        raise IngestError.single(f"{where} holds no cells; it is empty.")
    header, body = table[0], table[1:]
    _require_header(header, where)
    keep = []
    problems = []
    for i, name in enumerate(header):
        if name is not None:
            keep.append(i)
            continue
        filled = [number for number, row in enumerate(body, start=1) if row[i] is not None]
        if filled:
            keep.append(i)
            problems.append(Problem(
                f"Header row: column {i + 1} has no name, but row{'s' if len(filled) > 1 else ''} "
                f"{format_rows(filled)} hold{'' if len(filled) > 1 else 's'} values in it; "
                "name the column or remove it.", row=filled[0]))
    if problems and not any(h is not None for h in header):
        raise IngestError.single(f"{where} has no header row: the first row is empty.")
    if problems:
        raise IngestError(problems)
    return build_frame([header[i] for i in keep], [[r[i] for i in keep] for r in body], where)
