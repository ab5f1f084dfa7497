"""Read one worksheet of an XLSX upload, after checking the archive is safe to open."""

from __future__ import annotations

import datetime as dt
import io
import warnings
import zipfile
from xml.parsers import expat

from .errors import CELLS_LISTED_PER_COLUMN, IngestError, Problem, UploadTooLarge, format_size
from .limits import MAX_CELL_CHARS, MAX_XLSX_STRING_CHARS
from .raw import RawTable, clean_cell, split_header, trim_table

# Members smaller than this are never called a bomb whatever their ratio: tiny XML parts
# (styles, relationships) compress extremely well and are harmless.
_RATIO_FLOOR_BYTES = 1_000_000
_MAX_MEMBERS = 10_000


def check_archive(data: bytes, name: str, *, max_uncompressed: int, max_ratio: float) -> None:
    """Refuse a workbook that would expand too far, before any part of it is decompressed.

    Reads only the zip central directory: the declared uncompressed size of every member and
    its compression ratio. Python's ``zipfile`` never returns more than a member's declared size,
    so the declared sizes bound what openpyxl can be made to read.

    Raises
    ------
    UploadTooLarge
        Total declared size over ``max_uncompressed``, or a member (over 1 MB) compressed more
        than ``max_ratio`` to 1, or more than 10,000 members.
    IngestError
        The archive's directory cannot be read.
    """
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            members = archive.infolist()
    # zipfile reports a damaged directory through several exception types; all mean "damaged".
    except Exception:  # noqa: BLE001
        raise IngestError.single(
            f"'{name}' is a damaged XLSX workbook: its zip directory cannot be read.") from None
    if len(members) > _MAX_MEMBERS:
        raise UploadTooLarge.single(
            f"'{name}' has {len(members):,} parts inside; a workbook with more than "
            f"{_MAX_MEMBERS:,} is refused.")
    total = sum(m.file_size for m in members)
    if total > max_uncompressed:
        raise UploadTooLarge.single(
            f"'{name}' would expand to {format_size(total)} when opened; the limit is "
            f"{format_size(max_uncompressed)}. Save only the sheet you need, or upload CSV.")
    for member in members:
        if member.file_size < _RATIO_FLOOR_BYTES:
            continue
        ratio = member.file_size / member.compress_size if member.compress_size else float("inf")
        if ratio > max_ratio:
            raise UploadTooLarge.single(
                f"'{name}' part '{member.filename}' is compressed {ratio:,.0f} to 1 (limit "
                f"{max_ratio:g} to 1); the workbook is refused as a possible zip bomb.")


class _TooLong(Exception):
    """Raised from inside the XML scan to stop it at the first over-long string."""


class _DocumentType(Exception):
    """Raised from inside the XML scan when a part declares a document type."""


def _string_lengths_ok(stream, limit: int) -> None:
    """Stream one XML part through expat, raising :class:`_TooLong` as soon as any string
    (all text runs of a shared or inline string together, or the text of any other element)
    passes ``limit`` characters; :class:`_DocumentType` for a document type declaration, which
    a spreadsheet program never writes (and whose entities could expand without bound)."""
    parser = expat.ParserCreate()
    parser.buffer_text = True
    state = {"inside": 0, "length": 0}

    def start(tag, _attrs):
        if tag.rpartition(":")[2] in ("si", "is"):
            state["inside"] += 1
            state["length"] = 0
        elif not state["inside"]:
            state["length"] = 0

    def end(tag):
        if tag.rpartition(":")[2] in ("si", "is"):
            state["inside"] -= 1
        if not state["inside"]:
            state["length"] = 0

    def text(data):
        state["length"] += len(data)
        if state["length"] > limit:
            raise _TooLong

    def doctype(*_args):
        raise _DocumentType

    parser.StartElementHandler = start
    parser.EndElementHandler = end
    parser.CharacterDataHandler = text
    parser.StartDoctypeDeclHandler = doctype
    try:
        while chunk := stream.read(1 << 16):
            parser.Parse(chunk, False)
        parser.Parse(b"", True)
    except expat.ExpatError:
        return  # malformed XML: openpyxl reports the workbook as unreadable


def check_strings(data: bytes, name: str, *, limit: int = MAX_XLSX_STRING_CHARS) -> None:
    """Refuse a workbook holding a string too long for any cell, before openpyxl builds it.

    openpyxl reads the whole shared-string table into memory, and a cell's text in full, so a
    small file of one highly compressible string could make it build hundreds of megabytes.
    Every part is streamed through expat in 64 kB pieces instead, keeping only the length
    of the string being read. Every part, not only the usual names: openpyxl finds the shared
    strings and the sheets through the workbook's content types and relationships, which may
    name any part (:func:`check_archive` has already bounded their total size).

    Raises
    ------
    UploadTooLarge
        A string over ``limit`` characters (names the part and the per-cell limit).
    IngestError
        A part with a document type declaration.
    """
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        for member in archive.namelist():
            # Any name: a non-XML part (an image) stops expat at its first bytes.
            try:
                with archive.open(member) as stream:
                    _string_lengths_ok(stream, limit)
            except _TooLong:
                raise UploadTooLarge.single(
                    f"'{name}' part '{member}' holds a text of more than {limit:,} characters, "
                    f"more than a spreadsheet cell can hold; a cell may hold at most "
                    f"{MAX_CELL_CHARS:,}. The workbook is refused.") from None
            except _DocumentType:
                raise IngestError.single(
                    f"'{name}' cannot be read as an XLSX workbook (part '{member}' declares a "
                    "document type); open it in a spreadsheet program and save it again, or "
                    "upload CSV.") from None
            # A damaged member fails in zipfile or zlib in many ways; openpyxl then reports the
            # workbook as unreadable with the usual message.
            except Exception:  # noqa: BLE001, S112
                continue


def _cell_text(value: object) -> str | None:
    """Turn an openpyxl cell value into the text a CSV export would show."""
    if value is None:
        return None
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, dt.datetime):
        # A date typed in a spreadsheet is a datetime at midnight: show it as the date.
        if value.time() == dt.time(0, 0):
            return value.date().isoformat()
        return value.isoformat(sep=" ", timespec="seconds" if value.microsecond == 0
                               else "auto")
    if isinstance(value, dt.date | dt.time):
        return value.isoformat()
    return clean_cell(str(value))


def _is_formula(value: object) -> bool:
    # With data_only=False openpyxl gives formulas as "=..." text or as formula objects.
    if isinstance(value, str):
        return value.startswith("=")
    return type(value).__name__ in ("ArrayFormula", "DataTableFormula")


# Rows looked at to tell a table from a sheet of notes.
_TABLE_PROBE_ROWS = 5


def _first_table(workbook, names: tuple[str, ...]) -> str:
    """The first sheet that looks like a table (a row of at least two filled cells followed by
    another such row); the first sheet when none does. A workbook often opens with a notes or
    cover sheet."""
    for sheet_name in names:
        worksheet = workbook[sheet_name]
        if not hasattr(worksheet, "iter_rows"):
            continue
        wide = 0
        for row in worksheet.iter_rows(min_row=1, max_row=_TABLE_PROBE_ROWS, values_only=True):
            filled = sum(1 for v in row if v is not None and str(v).strip())
            wide = wide + 1 if filled >= 2 else 0
            if wide >= 2:
                return sheet_name
    return names[0]


def _read_grid(data: bytes, sheet: str | None, name: str, *, data_only: bool,
               max_cells: int) -> tuple[list[list[object]], str, tuple[str, ...]]:
    """Return the raw values of one sheet from A1 on, the sheet read and all sheet names."""
    from openpyxl import load_workbook  # here: a CSV upload or check need not load it

    with warnings.catch_warnings():
        # openpyxl warns about workbook features it drops (data validation, default styles);
        # none of them matter for reading values.
        warnings.simplefilter("ignore")
        workbook = load_workbook(io.BytesIO(data), read_only=True, data_only=data_only)
        try:
            names = tuple(workbook.sheetnames)
            if not names:
                raise IngestError.single(f"'{name}' holds no worksheets.")
            chosen = _first_table(workbook, names) if sheet is None else sheet
            if chosen not in names:
                listed = ", ".join(f"'{n}'" for n in names)
                raise IngestError.single(
                    f"Sheet '{chosen}' is not in '{name}'; it has {listed}.")
            worksheet = workbook[chosen]
            if not hasattr(worksheet, "iter_rows"):
                raise IngestError.single(f"Sheet '{chosen}' in '{name}' is a chart, not a table.")
            # The declared dimension can be wrong or huge; read only the cells actually present.
            worksheet.reset_dimensions()
            grid: list[list[object]] = []
            cells = 0
            for row in worksheet.iter_rows(min_row=1, min_col=1, values_only=True):
                cells += max(1, len(row))
                if cells > max_cells:
                    raise UploadTooLarge.single(
                        f"Sheet '{chosen}' holds more than {max_cells:,} cells (limit reached "
                        f"at sheet row {len(grid) + 1}); split the data or raise the limit.")
                grid.append(list(row))
        finally:
            workbook.close()
    return grid, chosen, names


def _formula_problems(data: bytes, sheet: str, name: str, values: list[list[str | None]],
                      saved: list[list[object]], top: int, left: int,
                      max_cells: int) -> list[Problem]:
    """Find formula cells inside the table that have no saved value.

    Files written by scripts (openpyxl among them) store formulas without the result; only a
    spreadsheet program computes and saves it. ``values`` is the trimmed table, ``saved`` the
    whole sheet as read with cached results; ``top`` and ``left`` are the 0-based sheet offsets
    of the table's first cell.
    """
    if not any(cell is None for row in values for cell in row):
        return []
    formulas, _, _ = _read_grid(data, sheet, name, data_only=False, max_cells=max_cells)
    header = values[0] if values else []
    found: list[tuple[int, int]] = []
    for i, row in enumerate(values):
        source = formulas[top + i] if top + i < len(formulas) else []
        cached = saved[top + i]
        for j, cell in enumerate(row):
            k = left + j
            if (cell is None and k < len(source) and _is_formula(source[k])
                    and (k >= len(cached) or cached[k] is None)):
                found.append((i, j))
    from openpyxl.utils import get_column_letter

    problems = []
    for i, j in found[:CELLS_LISTED_PER_COLUMN]:
        ref = f"{get_column_letter(left + j + 1)}{top + i + 1}"
        problems.append(Problem(
            f"Sheet '{sheet}' cell {ref} holds a formula with no saved value; open and save the "
            "file in a spreadsheet program, or paste values.",
            row=i if i > 0 else None, column=header[j] if j < len(header) else None))
    if len(found) > CELLS_LISTED_PER_COLUMN:
        problems.append(Problem(
            f"Sheet '{sheet}' has {len(found) - CELLS_LISTED_PER_COLUMN} more formula cells "
            "with no saved value."))
    return problems


def read_xlsx(data: bytes, name: str, sheet: str | None, *, max_cells: int,
              max_uncompressed: int, max_ratio: float) -> RawTable:
    """Read one worksheet (the first when ``sheet`` is None) into a :class:`RawTable`.

    The archive is checked with :func:`check_archive` and :func:`check_strings` first, then
    opened with openpyxl in
    read-only mode with cached formula results (``data_only=True``). Leading empty rows and
    columns are skipped, so the table may start anywhere; its first row is the header.
    Verified by the XLSX tests in ``tests/ingest``.

    Raises
    ------
    IngestError
        Unknown sheet, a damaged workbook, formula cells with no saved value (each cell named),
        no header, duplicate names, a cell or column name over its length cap.
    UploadTooLarge
        Zip-bomb guard, a string too long for any cell, or more than ``max_cells`` cells.
    """
    check_archive(data, name, max_uncompressed=max_uncompressed, max_ratio=max_ratio)
    check_strings(data, name)
    try:
        grid, chosen, names = _read_grid(data, sheet, name, data_only=True, max_cells=max_cells)
    except IngestError:
        raise
    # openpyxl fails on damaged or hand-made workbooks with many exception types (KeyError,
    # XML parse errors, TypeError ...); to the user each means the workbook cannot be read.
    except Exception as err:  # noqa: BLE001
        raise IngestError.single(
            f"'{name}' cannot be read as an XLSX workbook ({type(err).__name__}); open it in a "
            "spreadsheet program and save it again, or upload CSV.") from None
    texts = [[_cell_text(v) for v in row] for row in grid]
    top = next((i for i, row in enumerate(texts) if any(c is not None for c in row)), None)
    if top is None:
        raise IngestError.single(f"Sheet '{chosen}' in '{name}' is empty.")
    texts = texts[top:]
    left = min(next(j for j, c in enumerate(row) if c is not None)
               for row in texts if any(c is not None for c in row))
    texts = trim_table([row[left:] for row in texts])
    try:
        problems = _formula_problems(data, chosen, name, texts, grid, top, left, max_cells)
    except IngestError:
        raise
    except Exception as err:  # noqa: BLE001  (same reasoning as above)
        raise IngestError.single(
            f"'{name}' cannot be read as an XLSX workbook ({type(err).__name__}).") from None
    if problems:
        raise IngestError(problems)
    frame = split_header(texts, f"Sheet '{chosen}'")
    return RawTable(frame=frame, file_kind="xlsx", encoding=None, delimiter=None, decimal=".",
                    sheet=chosen, sheets=names)
