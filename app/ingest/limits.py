"""Every size limit an upload is held to, in one place.

The byte, cell and archive limits are defaults that the web layer and the command line may
raise; the length caps on one cell and one column name are fixed, because no measurement, level
or label needs more and a longer text is a pasted document or an attack on memory.
"""

from __future__ import annotations

DEFAULT_MAX_BYTES = 20_000_000
DEFAULT_MAX_CELLS = 2_000_000
DEFAULT_MAX_XLSX_UNCOMPRESSED = 200_000_000
DEFAULT_MAX_XLSX_RATIO = 100.0

# Longest text of one cell and of one column name, in characters (after stripping whitespace).
MAX_CELL_CHARS = 1_000
MAX_HEADER_CHARS = 200

# Longest text one XLSX string may expand to while the workbook is read; a spreadsheet program
# cannot put more in a cell, so anything longer is refused before it is built in memory.
MAX_XLSX_STRING_CHARS = 32_767
