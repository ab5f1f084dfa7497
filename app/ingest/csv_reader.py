"""Read a CSV text upload: encoding, delimiter and decimal mark are found from the content."""

from __future__ import annotations

import codecs
import csv
import io
import re

import numpy as np
import pandas as pd

from .errors import IngestError, UploadTooLarge
from .raw import RawTable, clean_grid, grid_from_rows, split_header

DELIMITERS = (",", ";", "\t")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}
# Sniff on the first part of the file only; a few hundred lines settle the delimiter.
_SNIFF_CHARS = 64_000
# C0 control characters other than tab, line feed and carriage return never occur in CSV text.
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x0c\x0e-\x1f\x7f]")
_DECIMAL_COMMA = re.compile(r"[+-]?\d*,\d+(?:[eE][+-]?\d+)?")
_DECIMAL_POINT = re.compile(r"[+-]?\d*\.\d+(?:[eE][+-]?\d+)?")
_SEP_HINT = re.compile(r"sep=(.)\r?\n?", re.IGNORECASE)


def _line_of(text: str, index: int) -> int:
    return text.count("\n", 0, index) + 1


def decode_text(data: bytes, name: str) -> tuple[str, str]:
    """Decode CSV bytes as UTF-8 (with or without byte-order mark), else Latin-1.

    Returns
    -------
    text, encoding : str, {"utf-8-sig", "utf-8", "latin-1"}

    Raises
    ------
    IngestError
        NUL or other control bytes (binary content), UTF-16 text, or a UTF-8 byte-order mark
        followed by bytes that are not UTF-8. The message gives the line.
    """
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise IngestError.single(
            f"'{name}' is UTF-16 text; save it as CSV in UTF-8 (or the local 8-bit encoding) "
            "and upload it again.")
    nul = data.find(b"\x00")
    if nul >= 0:
        line = data.count(b"\n", 0, nul) + 1
        raise IngestError.single(
            f"'{name}' holds NUL bytes (first on line {line}), "
            "so it is not a text file; upload CSV text or an XLSX workbook.")
    if data.startswith(codecs.BOM_UTF8):
        try:
            text, encoding = data[len(codecs.BOM_UTF8):].decode("utf-8"), "utf-8-sig"
        except UnicodeDecodeError as err:
            line = data.count(b"\n", 0, err.start + len(codecs.BOM_UTF8)) + 1
            raise IngestError.single(
                f"'{name}' starts with a UTF-8 mark but line {line} is not UTF-8; "
                "save the file again as CSV UTF-8.") from None
    else:
        try:
            text, encoding = data.decode("utf-8"), "utf-8"
        except UnicodeDecodeError:
            # Latin-1 maps every byte, so this always succeeds; the control check below is
            # what rejects binary content that happens to have no NUL bytes.
            text, encoding = data.decode("latin-1"), "latin-1"
    bad = _CONTROL.search(text)
    if bad:
        raise IngestError.single(
            f"'{name}' holds a control character (code {ord(bad.group()):#04x}) on line "
            f"{_line_of(text, bad.start())}, so it does not look like CSV text.")
    return text, encoding


def _width_score(sample: str, delimiter: str) -> int:
    """Count sample rows as wide as the header; 0 when the header has a single field."""
    try:
        rows = [r for r in csv.reader(io.StringIO(sample, newline=""), delimiter=delimiter) if r]
    except csv.Error:
        return 0
    if len(rows) < 1 or len(rows[0]) < 2:
        return 0
    return sum(1 for r in rows if len(r) == len(rows[0]))


def sniff_delimiter(text: str) -> str:
    """Pick the delimiter (comma, semicolon or tab) that splits most rows to the header's width.

    Ties go to semicolon, then tab, then comma: a file that splits equally well on ";" and ","
    is far more often a decimal-comma export than a comma file with semicolons in its cells.
    """
    sample = text[:_SNIFF_CHARS]
    if len(text) > _SNIFF_CHARS and "\n" in sample:
        sample = sample[: sample.rindex("\n")]
    preference = (";", "\t", ",")
    scores = {d: _width_score(sample, d) for d in preference}
    best = max(preference, key=lambda d: scores[d])
    return best if scores[best] > 0 else ","


def sniff_decimal(grid: pd.DataFrame, delimiter: str) -> str:
    """Return ``","`` when a semicolon- or tab-delimited file writes numbers like ``1,5``.

    ``grid`` holds the cleaned cells with the header as row 0. With a comma delimiter the
    decimal mark can only be ``"."``. Otherwise the mark used by more cells wins, so a stray
    cell of the other kind is reported as not a number by validation.
    """
    if delimiter == ",":
        return "."
    comma = point = 0
    for key in grid.columns:
        counts = grid[key].iloc[1:].value_counts(dropna=True)
        texts = counts.index.to_numpy(dtype=object)
        is_comma = np.fromiter((_DECIMAL_COMMA.fullmatch(t) is not None for t in texts), bool,
                               len(texts))
        is_point = np.fromiter((_DECIMAL_POINT.fullmatch(t) is not None for t in texts), bool,
                               len(texts))
        weights = counts.to_numpy()
        comma += int(weights[is_comma].sum())
        point += int(weights[is_point & ~is_comma].sum())
    return "," if comma > point else "."


def _fast_grid(text: str, delimiter: str, max_cells: int) -> pd.DataFrame | None:
    """Every cell as read by pandas' C parser, or None when :func:`_exact_grid` must decide.

    The C parser splits fields as the ``csv`` module does for any file it accepts; it refuses
    rows wider than the first, an unterminated quote and an empty file, and a table that might
    be over ``max_cells`` is left to the row-by-row count, so that each of those cases keeps
    its own result and message.
    """
    # Every cell ends at a delimiter or a line end: an upper bound, known before parsing, so a
    # file of bare delimiters is never expanded past the limit here (the exact count stops it).
    if text.count(delimiter) + text.count("\n") + 1 > max_cells:
        return None
    try:
        grid = pd.read_csv(io.StringIO(text), sep=delimiter, header=None, dtype=object,
                           na_filter=False, keep_default_na=False, skip_blank_lines=False,
                           quotechar='"', doublequote=True, engine="c")
    except (pd.errors.ParserError, pd.errors.EmptyDataError):
        return None
    if grid.size > max_cells:
        return None
    grid.columns = range(grid.shape[1])
    return grid


def _exact_grid(text: str, name: str, delimiter: str, max_cells: int) -> pd.DataFrame:
    """Every cell as read by the ``csv`` module, row by row, counting cells against the limit."""
    rows: list[list[str | None]] = []
    cells = 0
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        for row in reader:
            cells += max(1, len(row))
            if cells > max_cells:
                raise UploadTooLarge.single(
                    f"'{name}' holds more than {max_cells:,} cells (limit reached on line "
                    f"{reader.line_num}); split the data or raise the limit.")
            rows.append(row)
    except csv.Error as err:
        raise IngestError.single(
            f"'{name}' line {reader.line_num} cannot be read as "
            f"{_DELIMITER_NAMES[delimiter]}-separated text: {err}.") from None
    return grid_from_rows(rows)


def read_csv(data: bytes, name: str, *, max_cells: int) -> RawTable:
    """Read CSV bytes into a :class:`RawTable` of cleaned strings.

    The encoding is UTF-8 with or without a byte-order mark, else Latin-1; the delimiter is
    sniffed (an Excel ``sep=`` first line is honoured); the decimal mark is sniffed for
    semicolon- and tab-delimited files. Cells are split by pandas' C parser, falling back to
    the ``csv`` module row by row for the files it refuses, and cleaned column by column.
    Verified by the CSV tests in ``tests/ingest``.

    Raises
    ------
    IngestError
        Not text, unreadable quoting (names the line), no header, duplicate names, a cell or
        column name over its length cap.
    UploadTooLarge
        More than ``max_cells`` cells.
    """
    text, encoding = decode_text(data, name)
    hint = _SEP_HINT.match(text)
    if hint and hint.group(1) in DELIMITERS:
        delimiter, text = hint.group(1), text[hint.end():]
    else:
        delimiter = sniff_delimiter(text)
    if not text.strip():
        raise IngestError.single(f"'{name}' is empty: it holds no text.")
    grid = _fast_grid(text, delimiter, max_cells)
    if grid is None:
        grid = _exact_grid(text, name, delimiter, max_cells)
    grid = clean_grid(grid)
    frame = split_header(grid, f"'{name}'")
    decimal = sniff_decimal(grid, delimiter)
    return RawTable(frame=frame, file_kind="csv", encoding=encoding, delimiter=delimiter,
                    decimal=decimal)
