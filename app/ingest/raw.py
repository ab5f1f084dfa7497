"""The table as the file held it, before anyone has said what the columns mean."""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import IngestError, Problem, format_rows
from .limits import MAX_CELL_CHARS, MAX_HEADER_CHARS

# A plain decimal number: optional sign, digits with an optional fraction, optional exponent.
# Deliberately narrower than float(): "nan", "inf", "1_000" and hex are not measurements.
_NUMBER_POINT = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_NUMBER_COMMA = re.compile(r"[+-]?(?:\d+(?:,\d*)?|,\d+)(?:[eE][+-]?\d+)?")
# The ASCII characters str.strip() removes, other than the line break that joins a column.
_ASCII_BLANKS = (" ", "\t", "\r", "\x0b", "\x0c", "\x1c", "\x1d", "\x1e", "\x1f")
# What a column of plain numbers may hold besides the line breaks that join its texts.
_PLAIN_CHARS = {".": b"0123456789+-eE.\n", ",": b"0123456789+-eE,\n"}


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


def number_values(cells: pd.Series | np.ndarray, decimal: str = ".") -> np.ndarray:
    """:func:`parse_number` over a column at once: a float64 array, NaN where it gives None.

    Each distinct text is matched and converted once; the same patterns and the same refusal
    of overflow apply, so ``"nan"``, ``"inf"``, ``"1_000"``, hex and ``"1e999"`` are NaN here
    exactly when :func:`parse_number` refuses them. Empty cells (None) are NaN too.
    """
    values = np.asarray(cells, dtype=object)
    return _present_numbers(values, ~pd.isna(values), decimal)


# A column of at least this many filled cells whose first ones are mostly distinct (a measured
# response, run numbers) is read whole, in one pass in C, when every cell is a plain number:
# hashing 100,000 distinct texts to read each once costs more. (A column that turns out not to
# be plain numbers pays for the try, a few milliseconds at 100,000 rows.)
_DIRECT_FROM = 4096


def _mostly_distinct(filled: np.ndarray) -> bool:
    if len(filled) < _DIRECT_FROM:
        return False
    head = filled[:1024]
    return 4 * len(pd.unique(head)) > len(head)


def _present_numbers(values: np.ndarray, present: np.ndarray, decimal: str) -> np.ndarray:
    """:func:`number_values` of an object array whose filled cells are already known."""
    out = np.full(len(values), np.nan)
    if not present.any():
        return out
    filled = values[present]
    numbers = _plain_numbers(filled, decimal) if _mostly_distinct(filled) else None
    if numbers is None:  # repeated texts (factor levels), or some that are not plain numbers
        codes, distinct = pd.factorize(filled)
        numbers = _distinct_numbers(np.asarray(distinct, dtype=object), decimal)[codes]
    else:
        numbers[~np.isfinite(numbers)] = np.nan  # as _distinct_numbers does
    out[present] = numbers
    return out


def _distinct_numbers(texts: np.ndarray, decimal: str) -> np.ndarray:
    """Float64 value of each text, NaN for those :func:`parse_number` refuses."""
    numbers = _plain_numbers(texts, decimal)
    if numbers is None:
        pattern = _NUMBER_COMMA if decimal == "," else _NUMBER_POINT
        ok = np.fromiter(map(bool, map(pattern.fullmatch, texts)), bool, len(texts))
        numbers = np.full(len(texts), np.nan)
        if ok.any():
            numbers[ok] = _float_values(texts[ok], decimal)
    numbers[~np.isfinite(numbers)] = np.nan  # an exponent such as 1e999 overflows to inf
    return numbers


def _plain_numbers(texts: np.ndarray, decimal: str) -> np.ndarray | None:
    """Every text's value when each one is a plain number, else None.

    A column of numbers, the usual case, is settled by one scan of its characters in C instead
    of a pattern match per text. A text of ASCII digits, signs, "e" and the decimal mark alone
    is read by float() exactly when it matches the pattern: float()'s wider forms ("nan",
    "inf", "1_000", surrounding blanks, other scripts' digits) all need some other character.
    Verified against :func:`parse_number` in ``tests/ingest/test_ingest_columnwise.py``.
    """
    joined = "\n".join(texts)
    if (not joined.isascii() or joined.count("\n") != len(texts) - 1
            or joined.encode("ascii").translate(None, _PLAIN_CHARS[decimal])):
        return None
    try:
        return _float_values(texts, decimal)
    except ValueError:  # such as "e5" or "1.2.3": the pattern decides text by text
        return None


def _float_values(texts: np.ndarray, decimal: str) -> np.ndarray:
    """float() of each text (the decimal mark read as a point), so the same double."""
    if decimal == ",":
        texts = np.asarray([t.replace(",", ".") for t in texts], dtype=object)
    with np.errstate(over="ignore", invalid="ignore"):
        return texts.astype(np.float64)


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
    _columns: dict = field(default_factory=dict, init=False, repr=False)

    @property
    def n_rows(self) -> int:
        """Number of data rows."""
        return len(self.frame)

    def missing(self, column: str) -> np.ndarray:
        """Boolean array, true where the column's cell is empty (read-only, computed once)."""
        return self._column(column)[0]

    def numbers(self, column: str) -> np.ndarray:
        """The column through :func:`number_values` with this file's decimal mark: float64,
        NaN where a cell is empty or not a number (read-only, computed once)."""
        return self._column(column)[1]

    def _column(self, column: str) -> tuple[np.ndarray, np.ndarray]:
        if column not in self._columns:
            cells = self.frame[column].to_numpy(dtype=object)
            missing = pd.isna(cells)
            values = _present_numbers(cells, ~missing, self.decimal)
            missing.flags.writeable = values.flags.writeable = False
            self._columns[column] = (missing, values)
        return self._columns[column]


@dataclass(frozen=True)
class ColumnSummary:
    """What one column holds, counted at once: the numbers, the blanks and the other text.

    Attributes
    ----------
    name : str
    numbers, blanks, text : int
        Cells that are numbers, empty cells, and filled cells that are not numbers.
    low, high : float or None
        Smallest and largest number; None when the column holds none.
    """

    name: str
    numbers: int
    blanks: int
    text: int
    low: float | None
    high: float | None


def summarize_column(raw: RawTable, column: str) -> ColumnSummary:
    """Count a column's numbers, blanks and other text, with the range of its numbers."""
    missing, values = raw.missing(column), raw.numbers(column)
    found = ~np.isnan(values)
    count = int(found.sum())
    blanks = int(missing.sum())
    low = float(values[found].min()) if count else None
    high = float(values[found].max()) if count else None
    return ColumnSummary(column, count, blanks, len(values) - count - blanks, low, high)


def clean_cell(value: str | None) -> str | None:
    """Strip whitespace; an empty string becomes None."""
    if value is None:
        return None
    value = value.strip()
    return value or None


def grid_from_rows(rows: list[list[str | None]]) -> pd.DataFrame:
    """The cells of a file as a frame of object columns 0..w-1, rows shorter than the widest
    padded with None; row 0 is the file's first row."""
    width = max((len(r) for r in rows), default=0)
    grid = pd.DataFrame([r + [None] * (width - len(r)) for r in rows], dtype=object,
                        columns=range(width))
    return grid.reset_index(drop=True)


def clean_grid(grid: pd.DataFrame) -> pd.DataFrame:
    """:func:`clean_cell` column by column: whitespace stripped, empty or missing to None."""
    return pd.DataFrame({k: _clean_column(grid[k]) for k in grid.columns}, index=grid.index,
                        columns=grid.columns, dtype=object)


def _clean_column(column: pd.Series) -> np.ndarray:
    """Strip each distinct text once; empty and missing cells become None."""
    values = column.to_numpy(dtype=object)
    if _already_clean(values):
        return values
    codes, distinct = pd.factorize(values)
    cleaned = np.array([t.strip() or None for t in distinct.tolist()] + [None], dtype=object)
    return cleaned[codes]  # code -1 (missing) picks the trailing None


def _already_clean(values: np.ndarray) -> bool:
    """True when every cell is text that cleaning leaves as it is: not empty, ASCII, and
    without the blanks str.strip() removes. A column of numbers, the usual case, is settled by
    a few scans in C instead of a step per distinct text."""
    if not all(values):  # an empty or missing cell
        return False
    try:
        joined = "\n".join(values)
    except TypeError:  # a cell that is not text
        return False
    return (joined.isascii() and joined.count("\n") == len(values) - 1
            and not any(blank in joined for blank in _ASCII_BLANKS))


def trim_grid(grid: pd.DataFrame) -> pd.DataFrame:
    """Drop trailing empty rows, and trailing columns that are empty in every row.

    Spreadsheet exports often carry formatted but empty cells at the edges; they are not data.
    Empty rows inside the table are kept so that row numbers match the file.
    """
    filled = grid.notna().to_numpy()
    rows = np.flatnonzero(filled.any(axis=1))
    columns = np.flatnonzero(filled.any(axis=0))
    height = int(rows[-1]) + 1 if len(rows) else 0
    width = int(columns[-1]) + 1 if len(columns) and height else 0
    return grid.iloc[:height, :width]


def trim_table(table: list[list[str | None]]) -> list[list[str | None]]:
    """:func:`trim_grid` for a table held as lists; every row comes back the same width."""
    trimmed = trim_grid(grid_from_rows(table))
    return [[None if v is None or v != v else v for v in row]
            for row in trimmed.to_numpy(dtype=object).tolist()]


def split_header(table: list[list[str | None]] | pd.DataFrame, where: str) -> pd.DataFrame:
    """Take the first row as the header and build the frame.

    ``table`` holds cleaned cells, as lists of rows or as a grid from :func:`clean_grid`. A
    column with no name and no values (a spacer, or an export's stray delimiter) is dropped;
    a column with values but no name is a problem.
    """
    grid = trim_grid(table if isinstance(table, pd.DataFrame) else grid_from_rows(table))
    if grid.empty:
        raise IngestError.single(f"{where} holds no cells; it is empty.")
    header = [None if v is None or v != v else v for v in grid.iloc[0].tolist()]
    body = grid.iloc[1:]
    _require_header(header, where)
    keep = []
    problems = []
    for i, name in enumerate(header):
        if name is not None:
            keep.append(i)
            continue
        filled = (np.flatnonzero(body.iloc[:, i].notna().to_numpy()) + 1).tolist()
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
    return build_frame([header[i] for i in keep], body.iloc[:, keep], where)


def check_header_lengths(header: list[str | None]) -> None:
    """Refuse column names over :data:`~app.ingest.limits.MAX_HEADER_CHARS` characters.

    Raises
    ------
    IngestError
        Naming each such column by its position and the limit (the name is not repeated).
    """
    problems = [Problem(
        f"Header row: the name of column {position} is {len(name):,} characters long; a column "
        f"name may hold at most {MAX_HEADER_CHARS:,}.")
        for position, name in enumerate(header, start=1)
        if name is not None and len(name) > MAX_HEADER_CHARS]
    if problems:
        raise IngestError(problems)


def check_cell_lengths(frame: pd.DataFrame) -> None:
    """Refuse cells over :data:`~app.ingest.limits.MAX_CELL_CHARS` characters, per column.

    Raises
    ------
    IngestError
        One problem per column with such cells, naming the column, the rows and the limit.
    """
    problems = []
    for name in frame.columns:
        values = frame[name].to_numpy(dtype=object)
        # len over every cell in C (empty cells are None): a column of 100,000 distinct
        # numbers costs no more than a column of three names.
        longest = max(map(len, filter(None, values)), default=0)
        if longest <= MAX_CELL_CHARS:
            continue
        rows = frame.index[np.flatnonzero(
            [t is not None and len(t) > MAX_CELL_CHARS for t in values])].tolist()
        problems.append(Problem(
            f"Column '{name}' row{'s' if len(rows) > 1 else ''} {format_rows(rows)}: a cell may "
            f"hold at most {MAX_CELL_CHARS:,} characters, and the longest here holds "
            f"{longest:,}.", row=rows[0], column=name))
    if problems:
        raise IngestError(problems)


def build_frame(header: list[str | None], rows: list[list[str | None]] | pd.DataFrame,
                where: str) -> pd.DataFrame:
    """Check the header and assemble the object-dtype frame with index 1..n.

    Parameters
    ----------
    header : list
        First row of the table, cells already cleaned.
    rows : list of list, or pandas.DataFrame
        Data rows, cells already cleaned, each padded or cut to the header width.
    where : str
        How messages name the place, e.g. ``"The file"`` or ``"Sheet 'Runs'"``.

    Raises
    ------
    IngestError
        No header row, an unnamed or number-like column name, or duplicate names, or a cell
        longer than the cap.
    """
    problems: list[Problem] = []
    check_header_lengths(header)
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
    if not len(rows):
        raise IngestError.single(f"{where} has a header row but no data rows.")
    if isinstance(rows, pd.DataFrame):
        frame = pd.DataFrame({i: rows.iloc[:, i].to_numpy(dtype=object)
                              for i in range(len(header))}, dtype=object)
        frame.columns = header
    else:
        frame = pd.DataFrame(rows, columns=header, dtype=object)
    frame.index = pd.RangeIndex(1, len(rows) + 1, name="row")
    check_cell_lengths(frame)
    return frame


def _require_header(header: list[str | None], where: str) -> None:
    named = [h for h in header if h is not None]
    if named and all(looks_numeric(h) for h in named):
        raise IngestError.single(
            f"{where} has no header row: the first row holds only numbers "
            f"({', '.join(named[:3])}{' …' if len(named) > 3 else ''}). "
            "Add a first row that names every column.")
