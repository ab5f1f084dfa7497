"""Uploaded file bytes to a validated design table, or a list of problems naming row and column.

Pure: stdlib, pandas and openpyxl only; never flask or sqlalchemy.

Flow: :func:`read_upload` (bytes to :class:`RawTable`), :func:`suggest_roles` (a first guess the
user confirms), :func:`validate` (to :class:`DesignTable`), whose canonical CSV and roles JSON
reload exactly through :func:`load_canonical`.
"""

from __future__ import annotations

from pathlib import PurePath

from .canonical import DesignTable, load_canonical
from .csv_reader import read_csv
from .errors import IngestError, Problem, UploadTooLarge, format_size
from .limits import (
    DEFAULT_MAX_BYTES,
    DEFAULT_MAX_CELLS,
    DEFAULT_MAX_XLSX_RATIO,
    DEFAULT_MAX_XLSX_UNCOMPRESSED,
    MAX_CELL_CHARS,
    MAX_HEADER_CHARS,
)
from .raw import ColumnSummary, RawTable, summarize_column
from .roles import ColumnRole, suggest_roles, suggest_with_reasons, with_carried
from .sniff import detect_kind
from .validate import validate

__all__ = [
    "DEFAULT_MAX_BYTES",
    "DEFAULT_MAX_CELLS",
    "DEFAULT_MAX_XLSX_RATIO",
    "DEFAULT_MAX_XLSX_UNCOMPRESSED",
    "MAX_CELL_CHARS",
    "MAX_HEADER_CHARS",
    "ColumnRole",
    "ColumnSummary",
    "DesignTable",
    "IngestError",
    "Problem",
    "RawTable",
    "UploadTooLarge",
    "load_canonical",
    "read_upload",
    "suggest_roles",
    "suggest_with_reasons",
    "with_carried",
    "summarize_column",
    "validate",
]


def read_upload(data: bytes, filename: str, sheet: str | None = None, *,
                max_bytes: int = DEFAULT_MAX_BYTES, max_cells: int = DEFAULT_MAX_CELLS,
                max_xlsx_uncompressed: int = DEFAULT_MAX_XLSX_UNCOMPRESSED,
                max_xlsx_ratio: float = DEFAULT_MAX_XLSX_RATIO) -> RawTable:
    """Read an uploaded CSV or XLSX file into a :class:`RawTable` of text cells.

    Parameters
    ----------
    data : bytes
        The file exactly as uploaded.
    filename : str
        The uploaded name; its extension must agree with the content.
    sheet : str, optional
        XLSX worksheet to read; the first one when None. Ignored for CSV.
    max_bytes, max_cells : int
        Size limits for the upload and for the table.
    max_xlsx_uncompressed, max_xlsx_ratio : int, float
        Zip-bomb guard: the total declared uncompressed size of the workbook, and the largest
        compression ratio allowed for any part over 1 MB.

    Raises
    ------
    UploadTooLarge
        Any size limit exceeded (the web layer answers 413). The message states the limit.
    IngestError
        Empty file, content that does not match the extension, no header, duplicate column
        names, unknown sheet, formula cells with no saved value, unreadable file.
    """
    if not isinstance(data, bytes | bytearray | memoryview):
        raise IngestError.single("The upload must be bytes.")
    data = bytes(data)
    name = PurePath(filename or "").name or "the upload"
    if len(data) > max_bytes:
        raise UploadTooLarge.single(
            f"'{name}' is {format_size(len(data))}; the limit is {format_size(max_bytes)}.")
    if not data.strip():
        raise IngestError.single(f"'{name}' is empty.")
    kind = detect_kind(data, name)
    if kind == "xlsx":
        from .xlsx_reader import read_xlsx  # zip and XML parsing, for workbooks only

        return read_xlsx(data, name, sheet, max_cells=max_cells,
                         max_uncompressed=max_xlsx_uncompressed, max_ratio=max_xlsx_ratio)
    return read_csv(data, name, max_cells=max_cells)
