"""Problems found in an uploaded table, and the errors that carry them."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

# How many offending cells one column lists before the rest are summarised as "and N more".
CELLS_LISTED_PER_COLUMN = 5


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an upload, in one plain sentence.

    Attributes
    ----------
    message : str
        Names the row, column or field concerned.
    row : int or None
        1-based data row (the first row after the header is row 1); None when not row-specific.
    column : str or None
        Column name as written in the header, or None.
    """

    message: str
    row: int | None = None
    column: str | None = None

    def to_dict(self) -> dict:
        """Return ``{"message", "row", "column"}`` for JSON and templates."""
        return {"message": self.message, "row": self.row, "column": self.column}


class IngestError(ValueError):
    """An upload that cannot become a design table; ``problems`` lists every reason found."""

    def __init__(self, problems: Iterable[Problem]):
        self.problems: list[Problem] = list(problems)
        if not self.problems:
            raise ValueError("IngestError needs at least one Problem")
        super().__init__(" ".join(p.message for p in self.problems))

    @classmethod
    def single(cls, message: str, row: int | None = None, column: str | None = None):
        """Build the error from one problem."""
        return cls([Problem(message, row=row, column=column)])


class UploadTooLarge(IngestError):
    """The upload is over a size limit; the web layer answers with HTTP 413."""


def format_rows(rows: list[int]) -> str:
    """Join row numbers for a message: ``"3"``, ``"3 and 7"``, ``"3, 7, 9 and 2 more"``.

    At most ``CELLS_LISTED_PER_COLUMN`` numbers are written out.
    """
    shown = [str(r) for r in rows[:CELLS_LISTED_PER_COLUMN]]
    hidden = len(rows) - len(shown)
    if hidden:
        return f"{', '.join(shown)} and {hidden} more"
    if len(shown) == 1:
        return shown[0]
    return f"{', '.join(shown[:-1])} and {shown[-1]}"


def format_size(n_bytes: int) -> str:
    """Human size with a unit, e.g. ``"20 MB"`` or ``"512 bytes"`` (decimal units)."""
    if n_bytes >= 1_000_000:
        return f"{n_bytes / 1_000_000:.4g} MB"
    if n_bytes >= 1_000:
        return f"{n_bytes / 1_000:.4g} kB"
    return f"{n_bytes} bytes"
