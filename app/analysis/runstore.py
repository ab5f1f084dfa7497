"""The per-run table of a fit, stored column-wise in one compact, hashable block of bytes.

A fit with 100,000 runs would be 100,000 JSON objects in the results document; instead the
results document carries a summary (``runs_summary``) naming the SHA-256 of this block, and the
block is stored beside the snapshot. The snapshot hash covers the summary, so it covers the block.

Format ``plumbline-runs/1`` (all integers little-endian):

* the 8 bytes ``PLRUNS1\\n``;
* the header length as an unsigned 64-bit integer, then the header: canonical JSON (sorted keys,
  no spaces, UTF-8) with ``n``, ``factors``, ``columns`` (name and numpy dtype string, in storage
  order), ``label`` (a list, or null), ``exclusion_reason`` and ``flags`` (sparse maps keyed by
  the position of the run, as text);
* each column's values in turn: ``n`` items of its dtype (NaN where a value is missing).

The same table always gives the same bytes. Pure: numpy only.
"""

from __future__ import annotations

import hashlib
import json
import math
import struct
from dataclasses import dataclass
from typing import Any

import numpy as np

FORMAT = "plumbline-runs/1"
MAGIC = b"PLRUNS1\n"
NUMERIC = ("observed", "response_model_scale", "fitted", "residual", "standardized",
           "studentized", "deleted_studentized", "leverage", "cooks_distance", "dffits")


class RunStoreError(ValueError):
    """Bytes that are not a per-run block of this format."""


@dataclass(frozen=True)
class RunColumns:
    """A fit's runs as columns: numpy arrays plus the few text fields, in row order.

    ``coded`` and ``actual`` hold one column per factor (name to array); ``flags`` maps a row
    number to the ids of the checks that flagged it.
    """

    row: np.ndarray
    run_order: np.ndarray
    excluded: np.ndarray
    values: dict[str, np.ndarray]
    coded: dict[str, np.ndarray]
    actual: dict[str, np.ndarray]
    factors: tuple[str, ...]
    label: list | None
    exclusion_reason: dict[int, str]
    flags: dict[int, list[str]]

    def __len__(self) -> int:
        return len(self.row)

    def __getitem__(self, name: str) -> np.ndarray:
        return self.values[name]

    @property
    def included(self) -> np.ndarray:
        """Runs that entered the fit and carry residual diagnostics."""
        return ~self.excluded & np.isfinite(self.values["standardized"])

    def labels(self, index: np.ndarray | None = None) -> list[str]:
        """Each run's label, or ``row N`` where it has none."""
        idx = range(len(self)) if index is None else np.asarray(index).tolist()
        rows = self.row
        return [(self.label[i] if self.label is not None and self.label[i] else None)
                or f"row {int(rows[i])}" for i in idx]

    def records(self, start: int = 0, stop: int | None = None) -> list[dict[str, Any]]:
        """Runs ``start``..``stop`` as the per-run objects the API serves (missing as None)."""
        stop = len(self) if stop is None else min(stop, len(self))
        start = max(0, min(start, stop))
        sl = slice(start, stop)

        def col(a: np.ndarray) -> list:
            return [v if math.isfinite(v) else None for v in a[sl].astype(float).tolist()]

        numeric = {name: col(self.values[name]) for name in NUMERIC}
        coded = {name: col(a) for name, a in self.coded.items()}
        actual = {name: col(a) for name, a in self.actual.items()}
        order = [None if v is None else int(v) for v in col(self.run_order)]
        rows = self.row[sl].tolist()
        excluded = self.excluded[sl].tolist()
        out = []
        for k, i in enumerate(range(start, stop)):
            rec = {"row": rows[k], "run_order": order[k],
                   "label": None if self.label is None else self.label[i],
                   "excluded": bool(excluded[k]),
                   "exclusion_reason": self.exclusion_reason.get(i),
                   "coded": {f: coded[f][k] for f in self.factors},
                   "actual": {f: actual[f][k] for f in self.factors},
                   "flags": list(self.flags.get(rows[k], []))}
            for name in NUMERIC:
                rec[name] = numeric[name][k]
            out.append(rec)
        return out

    def summary(self) -> dict[str, Any]:
        """Counts a page or a document shows without the table itself."""
        return {"n": len(self), "excluded": int(self.excluded.sum()),
                "flagged": len(self.flags)}


def from_table(runs: Any, flags: dict[int, list[str]]) -> RunColumns:
    """From the engine's ``RunTable`` and the check flags by row."""
    n = len(runs.row)
    reasons = {i: r for i, r in enumerate(runs.exclusion_reason) if r is not None}
    order = (np.asarray(runs.run_order, dtype=float) if runs.run_order is not None
             else np.full(n, np.nan))
    names = tuple(runs.factor_names)
    coded = np.asarray(runs.coded, dtype=float).reshape(n, len(names))
    actual = np.asarray(runs.actual, dtype=float).reshape(n, len(names))
    label = None if runs.label is None else [None if v is None else str(v) for v in runs.label]
    return RunColumns(
        row=np.asarray(runs.row, dtype=np.int64), run_order=order,
        excluded=np.asarray(runs.excluded, dtype=bool),
        values={name: np.asarray(getattr(runs, name), dtype=float) for name in NUMERIC},
        coded={f: coded[:, j].copy() for j, f in enumerate(names)},
        actual={f: actual[:, j].copy() for j, f in enumerate(names)},
        factors=names, label=label, exclusion_reason=reasons,
        flags={int(r): list(ids) for r, ids in sorted(flags.items())})


def from_records(records: list[dict[str, Any]]) -> RunColumns:
    """From per-run objects (fits stored before the column form kept them in the document)."""
    n = len(records)
    factors = tuple(records[0]["actual"]) if records else ()

    def num(values) -> np.ndarray:
        return np.array([np.nan if v is None else v for v in values], dtype=float).reshape(n)

    labels = [r.get("label") for r in records]
    return RunColumns(
        row=np.array([r["row"] for r in records], dtype=np.int64).reshape(n),
        run_order=num(r.get("run_order") for r in records),
        excluded=np.array([bool(r.get("excluded")) for r in records], dtype=bool).reshape(n),
        values={name: num(r.get(name) for r in records) for name in NUMERIC},
        coded={f: num((r.get("coded") or {}).get(f) for r in records) for f in factors},
        actual={f: num((r.get("actual") or {}).get(f) for r in records) for f in factors},
        factors=factors, label=labels if any(v is not None for v in labels) else None,
        exclusion_reason={i: r["exclusion_reason"] for i, r in enumerate(records)
                          if r.get("exclusion_reason")},
        flags={int(r["row"]): list(r["flags"]) for r in records if r.get("flags")})


def _columns(cols: RunColumns) -> list[tuple[str, np.ndarray]]:
    out = [("row", cols.row.astype("<i8")), ("run_order", cols.run_order.astype("<f8")),
           ("excluded", cols.excluded.astype("u1"))]
    out += [(name, cols.values[name].astype("<f8")) for name in NUMERIC]
    out += [(f"coded:{f}", cols.coded[f].astype("<f8")) for f in cols.factors]
    out += [(f"actual:{f}", cols.actual[f].astype("<f8")) for f in cols.factors]
    return out


def encode(cols: RunColumns) -> bytes:
    """The block's bytes (deterministic: the same table gives the same bytes)."""
    columns = _columns(cols)
    header = {"format": FORMAT, "n": len(cols), "factors": list(cols.factors),
              "columns": [[name, a.dtype.str] for name, a in columns],
              "label": cols.label,
              "exclusion_reason": {str(i): r for i, r in sorted(cols.exclusion_reason.items())},
              "flags": {str(r): ids for r, ids in sorted(cols.flags.items())}}
    head = json.dumps(header, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False, allow_nan=False).encode()
    parts = [MAGIC, struct.pack("<Q", len(head)), head]
    parts += [np.ascontiguousarray(a).tobytes() for _, a in columns]
    return b"".join(parts)


def decode(data: bytes) -> RunColumns:
    """The table back from :func:`encode`'s bytes; RunStoreError when they are not such."""
    view = memoryview(data)
    if bytes(view[:8]) != MAGIC or len(view) < 16:
        raise RunStoreError("not a per-run block (bad magic)")
    (size,) = struct.unpack("<Q", view[8:16])
    try:
        header = json.loads(bytes(view[16:16 + size]))
    except ValueError as exc:
        raise RunStoreError("per-run block header is not JSON") from exc
    n, pos = int(header["n"]), 16 + size
    arrays: dict[str, np.ndarray] = {}
    for name, dtype in header["columns"]:
        dt = np.dtype(dtype)
        end = pos + n * dt.itemsize
        if end > len(view):
            raise RunStoreError(f"per-run block is cut short in column '{name}'")
        arrays[name] = np.frombuffer(view[pos:end], dtype=dt)
        pos = end
    if pos != len(view):
        raise RunStoreError("per-run block has bytes after its last column")
    factors = tuple(header["factors"])
    return RunColumns(
        row=arrays["row"].astype(np.int64), run_order=arrays["run_order"].astype(float),
        excluded=arrays["excluded"].astype(bool),
        values={name: arrays[name].astype(float) for name in NUMERIC},
        coded={f: arrays[f"coded:{f}"].astype(float) for f in factors},
        actual={f: arrays[f"actual:{f}"].astype(float) for f in factors},
        factors=factors, label=header["label"],
        exclusion_reason={int(i): r for i, r in header["exclusion_reason"].items()},
        flags={int(r): ids for r, ids in header["flags"].items()})


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def runs_summary(cols: RunColumns, data: bytes) -> dict[str, Any]:
    """What the results document holds in place of the runs: counts, format, size and hash."""
    return {"format": FORMAT, "sha256": sha256(data), "bytes": len(data), **cols.summary()}


def is_summary(runs: Any) -> bool:
    return isinstance(runs, dict) and runs.get("format") == FORMAT
