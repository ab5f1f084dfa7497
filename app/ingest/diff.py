"""Differences between two data versions' tables: changed cells, added and removed rows, added,
removed and re-declared columns. Pure (pandas only), like the rest of ingest.

Rows are matched by the run label when both tables have one whose values are unique and not
blank, else by run order when both record it uniquely, else by position (row number). A column
renamed between versions shows as one removed and one added; when the two hold the same values
in every matched row the pair is also listed as a likely rename.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from app.ingest.canonical import DesignTable
from app.ingest.raw import number_values

MATCHED_BY_WORDS = {"label": "run label", "run_order": "run order", "row": "row number"}


@dataclass(frozen=True)
class CellChange:
    """One cell whose value differs: ``key`` is the matched run (label, run order or row)."""

    key: Any
    old_row: int
    new_row: int
    column: str
    old: Any
    new: Any

    def to_dict(self) -> dict[str, Any]:
        return {"key": self.key, "old_row": self.old_row, "new_row": self.new_row,
                "column": self.column, "old": self.old, "new": self.new}


@dataclass(frozen=True)
class TableDifferences:
    """What changed from an older table to a newer one.

    Attributes
    ----------
    matched_by : {"label", "run_order", "row"}
    key_columns : (old, new) names of the matching column, None when matched by row number
    changed : every changed cell, in the new table's row order, then column order
    added_rows, removed_rows : ``{"key", "row"}`` for runs only in the new / old table
    columns_added, columns_removed : column names in file order
    roles_changed : ``{"column", "old", "new"}`` with both roles as dicts
    renamed : ``{"old", "new"}``: a removed and an added column with equal values
    """

    matched_by: str
    key_columns: tuple[str | None, str | None]
    changed: tuple[CellChange, ...]
    added_rows: tuple[dict[str, Any], ...]
    removed_rows: tuple[dict[str, Any], ...]
    columns_added: tuple[str, ...]
    columns_removed: tuple[str, ...]
    roles_changed: tuple[dict[str, Any], ...]
    renamed: tuple[dict[str, str], ...]

    @property
    def rows_changed(self) -> int:
        """Number of matched runs with at least one changed cell."""
        return len({c.new_row for c in self.changed})

    @property
    def none(self) -> bool:
        """True when the two tables hold the same columns, roles and values."""
        return not (self.changed or self.added_rows or self.removed_rows or self.columns_added
                    or self.columns_removed or self.roles_changed)

    def counts(self) -> dict[str, int]:
        return {"cells_changed": len(self.changed), "rows_changed": self.rows_changed,
                "rows_added": len(self.added_rows), "rows_removed": len(self.removed_rows),
                "columns_added": len(self.columns_added),
                "columns_removed": len(self.columns_removed),
                "roles_changed": len(self.roles_changed)}

    CSV_HEADER = ("change", "run", "old_row", "new_row", "column", "old", "new")

    def csv_rows(self) -> list[tuple[Any, ...]]:
        """Every difference as one row under ``CSV_HEADER`` (cells, then rows, then columns)."""
        out: list[tuple[Any, ...]] = [("cell changed", c.key, c.old_row, c.new_row, c.column,
                                       c.old, c.new) for c in self.changed]
        out += [("run added", r["key"], None, r["row"], None, None, None)
                for r in self.added_rows]
        out += [("run removed", r["key"], r["row"], None, None, None, None)
                for r in self.removed_rows]
        out += [("column added", None, None, None, c, None, None) for c in self.columns_added]
        out += [("column removed", None, None, None, c, None, None)
                for c in self.columns_removed]
        out += [("role changed", None, None, None, r["column"], r["old"]["role"],
                 r["new"]["role"]) for r in self.roles_changed]
        return out

    def to_dict(self, *, limit: int | None = None) -> dict[str, Any]:
        """JSON-able; ``limit`` keeps the first that many changed cells (counts stay whole)."""
        cells = self.changed if limit is None else self.changed[:limit]
        return {"matched_by": self.matched_by, "key_columns": list(self.key_columns),
                "counts": self.counts(), "changed_cells": [c.to_dict() for c in cells],
                "added_rows": list(self.added_rows), "removed_rows": list(self.removed_rows),
                "columns_added": list(self.columns_added),
                "columns_removed": list(self.columns_removed),
                "roles_changed": list(self.roles_changed), "renamed": list(self.renamed)}


def _plain(value: Any) -> Any:
    """A cell as JSON takes it (numpy scalars to Python, NaN to None)."""
    if value is None or (isinstance(value, float) and value != value):
        return None
    return value.item() if isinstance(value, np.generic) else value


def _unique_keys(values: pd.Series) -> bool:
    return bool(values.notna().all() and (values.astype(str) != "").all()
                and values.is_unique)


def _keys(old: DesignTable, new: DesignTable) -> tuple[str, pd.Series, pd.Series]:
    """How rows are matched, and each table's key per row (index = row number)."""
    for kind in ("label", "run_order"):
        a, b = getattr(old, kind), getattr(new, kind)
        if a and b and _unique_keys(old.frame[a]) and _unique_keys(new.frame[b]):
            return kind, old.frame[a], new.frame[b]
    return ("row", pd.Series(old.frame.index, index=old.frame.index),
            pd.Series(new.frame.index, index=new.frame.index))


def _differ(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Elementwise a != b with missing equal to missing (object or float columns). A column
    read as numbers in one version and as text in the other (its role's kind changed) is
    compared as numbers where its text reads as one: 160.0 and "160" are the same cell."""
    missing_a, missing_b = pd.isna(a), pd.isna(b)
    a, b = _as_numbers_beside(a, b), _as_numbers_beside(b, a)
    with np.errstate(invalid="ignore"):
        same = (a == b) | (missing_a & missing_b)
    return ~np.asarray(same, dtype=bool)


def _as_numbers_beside(values: np.ndarray, other: np.ndarray) -> np.ndarray:
    """``values`` as numbers (NaN where a text is not one) when they are text and ``other``
    are numbers; else unchanged. Text keeps the file's own writing, so a number is read with
    a decimal point, or failing that a decimal comma ('143,68')."""
    if values.dtype != object or other.dtype.kind not in "fiu":
        return values
    texts = np.array([None if v is None or v != v else str(v) for v in values], dtype=object)
    numbers = number_values(texts, ".")
    unread = np.isnan(numbers)
    if unread.any():
        numbers[unread] = number_values(texts[unread], ",")
    return numbers


def table_differences(old: DesignTable, new: DesignTable) -> TableDifferences:
    """Compare ``old`` with ``new`` (see the module docstring for how rows are matched)."""
    matched_by, old_keys, new_keys = _keys(old, new)
    old_pos = {k: i for i, k in enumerate(old_keys.tolist())}
    new_pos = {k: i for i, k in enumerate(new_keys.tolist())}
    both = [k for k in new_keys.tolist() if k in old_pos]
    old_at = np.array([old_pos[k] for k in both], dtype=np.int64)
    new_at = np.array([new_pos[k] for k in both], dtype=np.int64)
    old_rows, new_rows = old.frame.index.to_numpy(), new.frame.index.to_numpy()

    key_columns = (None, None) if matched_by == "row" else (getattr(old, matched_by),
                                                          getattr(new, matched_by))
    common = [c for c in new.frame.columns if c in old.frame.columns
              and c not in key_columns]
    found: list[tuple[int, int, CellChange]] = []
    for ci, column in enumerate(common):
        a = old.frame[column].to_numpy()[old_at]
        b = new.frame[column].to_numpy()[new_at]
        for k in np.flatnonzero(_differ(a, b)).tolist():
            found.append((int(new_at[k]), ci, CellChange(
                key=_plain(both[k]), old_row=int(old_rows[old_at[k]]),
                new_row=int(new_rows[new_at[k]]), column=column, old=_plain(a[k]),
                new=_plain(b[k]))))
    found.sort(key=lambda t: (t[0], t[1]))

    added = tuple({"key": _plain(k), "row": int(new_rows[i])}
                  for k, i in new_pos.items() if k not in old_pos)
    removed = tuple({"key": _plain(k), "row": int(old_rows[i])}
                    for k, i in old_pos.items() if k not in new_pos)
    columns_added = tuple(c for c in new.roles if c not in old.roles)
    columns_removed = tuple(c for c in old.roles if c not in new.roles)
    roles_changed = tuple({"column": c, "old": old.roles[c].to_dict(),
                           "new": new.roles[c].to_dict()}
                          for c in new.roles if c in old.roles and old.roles[c] != new.roles[c])

    def same_values(gone: str, came: str) -> bool:
        return (gone in old.frame.columns and came in new.frame.columns and len(both) > 0
                and not _differ(old.frame[gone].to_numpy()[old_at],
                                new.frame[came].to_numpy()[new_at]).any())

    renamed = tuple({"old": gone, "new": came} for gone in columns_removed
                    for came in columns_added if same_values(gone, came))
    return TableDifferences(matched_by, key_columns, tuple(c for _, _, c in found), added,
                            removed, columns_added, columns_removed, roles_changed, renamed)
