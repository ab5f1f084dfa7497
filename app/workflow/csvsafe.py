"""CSV cells that a spreadsheet shows as text and never runs as a formula (OWASP CSV injection).

A cell beginning with ``=``, ``+``, ``-``, ``@``, tab or carriage return gets a leading
apostrophe. Data tables keep plain numbers such as ``-1.5`` as they are (:func:`neutralise`);
the audit-trail export, whose cells are recorded text, prefixes every such cell
(:func:`neutralise_all`).
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable
from typing import Any

from app.ingest.raw import parse_number

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_all(cell: Any) -> str:
    text = "" if cell is None else str(cell)
    return "'" + text if text.startswith(FORMULA_STARTS) else text


def neutralise(cell: Any) -> str:
    """As :func:`neutralise_all`, but plain numbers (-1.5, +2e3) stay numbers."""
    text = "" if cell is None else str(cell)
    if text.startswith(FORMULA_STARTS) and parse_number(text) is None:
        return "'" + text
    return text


def safe_csv(data: bytes) -> bytes:
    """Re-write a UTF-8 CSV with every text cell neutralised (numbers unchanged)."""
    rows: Iterable[list[str]] = csv.reader(io.StringIO(data.decode("utf-8"), newline=""))
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    for row in rows:
        writer.writerow([neutralise(c) for c in row])
    return out.getvalue().encode("utf-8")
