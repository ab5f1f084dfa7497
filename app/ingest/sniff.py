"""Decide what an upload is from its bytes, and check that against the file name."""

from __future__ import annotations

import io
import zipfile
from pathlib import PurePath

from .errors import IngestError

TEXT_SUFFIXES = (".csv", ".tsv", ".txt")
XLSX_SUFFIXES = (".xlsx", ".xlsm")

# Leading bytes of formats people upload by mistake (published magic numbers of each format).
_SIGNATURES: tuple[tuple[bytes, str], ...] = (
    (b"%PDF", "a PDF document"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1", "an old binary Office file (.xls or .doc)"),
    (b"\x1f\x8b", "a gzip archive"),
    (b"\x89PNG\r\n\x1a\n", "a PNG image"),
    (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF87a", "a GIF image"),
    (b"GIF89a", "a GIF image"),
    (b"7z\xbc\xaf\x27\x1c", "a 7-Zip archive"),
    (b"Rar!\x1a\x07", "a RAR archive"),
    (b"{\\rtf", "a rich-text document"),
)
_ZIP_SIGNATURES = (b"PK\x03\x04", b"PK\x05\x06", b"PK\x07\x08")


def _describe_zip(data: bytes) -> str:
    """Say which kind of zip container this is: ``"xlsx"`` or a phrase for the message."""
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            names = set(archive.namelist())
            mimetype = b""
            if "mimetype" in names:
                with archive.open("mimetype") as member:
                    mimetype = member.read(100)
    # A damaged archive can fail in zipfile, zlib or struct in many ways; all mean the same here.
    except Exception:  # noqa: BLE001
        return "a damaged zip archive"
    if "[Content_Types].xml" in names and "xl/workbook.xml" in names:
        return "xlsx"
    if b"opendocument.spreadsheet" in mimetype:
        return "an OpenDocument spreadsheet (.ods)"
    if "word/document.xml" in names:
        return "a Word document"
    return "a zip archive"


def describe_content(data: bytes) -> str:
    """Name what the bytes hold: ``"xlsx"``, ``"text"``, or a phrase such as ``"a PDF document"``.

    Only the leading bytes and, for zip containers, the member names are read. ``"text"`` means
    "not a known binary format"; the CSV reader still checks that the bytes decode as text.
    """
    head = data[:16]
    if head.startswith(_ZIP_SIGNATURES):
        return _describe_zip(data)
    for signature, phrase in _SIGNATURES:
        if head.startswith(signature):
            return phrase
    stripped = data[:512].lstrip().lower()
    if stripped.startswith((b"<!doctype html", b"<html")):
        return "a web page (HTML)"
    return "text"


def detect_kind(data: bytes, filename: str) -> str:
    """Return ``"csv"`` or ``"xlsx"`` when the file name and the content agree.

    Raises
    ------
    IngestError
        Unknown extension, or content that does not match it (for example a PDF or an XLSX
        workbook named ``.csv``, or a text file named ``.xlsx``). The problem's column is None;
        the message names the file.
    """
    name = PurePath(filename or "").name or "the upload"
    suffix = PurePath(name).suffix.lower()
    content = describe_content(data)
    if suffix == ".xls":
        raise IngestError.single(
            f"'{name}' is an old binary .xls workbook, which is not read; save the sheet as "
            ".xlsx or CSV and upload that.")
    if suffix in XLSX_SUFFIXES:
        if content == "xlsx":
            return "xlsx"
        found = "text" if content == "text" else content
        raise IngestError.single(
            f"'{name}' is named as an XLSX workbook but holds {found}; "
            "upload the workbook itself, or save the data as CSV with a .csv name.")
    if suffix in TEXT_SUFFIXES:
        if content == "text":
            return "csv"
        found = "an XLSX workbook" if content == "xlsx" else content
        raise IngestError.single(
            f"'{name}' is named as a CSV text file but holds {found}; "
            "rename it to match what it is, or export the data as CSV.")
    raise IngestError.single(
        f"'{name}' has an extension that is not read ('{suffix or 'none'}'); upload a CSV text "
        "file (.csv, .tsv, .txt) or an XLSX workbook (.xlsx).")
