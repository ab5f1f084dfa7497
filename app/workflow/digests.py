"""The SHA-256 digests that seal the record's rows, recomputed from their stored columns.

A fit's snapshot, a setpoint proposal's snapshot and a confirmation run's record are each hashed
over a canonical JSON document (:func:`app.store.audit.canonical_json`). The functions live here,
apart from the workflows that write those rows, so that checking the record (``plumbline audit
verify``, :mod:`app.workflow.replay`) needs neither the analysis nor its numerical libraries
(the per-run block's format, :mod:`app.analysis.runstore`, needs numpy only).
:mod:`app.workflow.fits`, :mod:`app.workflow.setpoints` and :mod:`app.workflow.confirmations`
re-export them under their usual names.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, object_session

from app.analysis import runstore
from app.store.audit import canonical_json
from app.store.models import ConfirmationRun, Fit, FitRuns, SetpointProposal

# Canonical snapshot hashes of fits by a digest of their raw stored columns (bounded).
_SNAPSHOT_HASHES: dict[str, str] = {}


def fit_snapshot_document(fit: Fit) -> dict[str, Any]:
    """What a fit's SHA-256 covers: the data it used, the inputs, the results, the software."""
    return {
        "data_version_id": fit.data_version_id,
        "data_canonical_sha256": fit.data_version.canonical_sha256,
        "spec": json.loads(fit.spec_json),
        "results": json.loads(fit.results_json),
        "thresholds": json.loads(fit.thresholds_json),
        "software_version": fit.software_version,
    }


def fit_snapshot_sha256(fit: Fit) -> str:
    """SHA-256 of the canonical snapshot document, recomputed from the stored columns.

    Pages check a snapshot once per signature shown; parsing and re-serialising the results
    each time is the costly part, so the canonical hash is remembered per digest of the raw
    stored values. Any change to a stored column changes that digest and forces a recompute.
    """
    raw = hashlib.sha256("\x1f".join((
        str(fit.data_version_id), fit.data_version.canonical_sha256, fit.spec_json,
        fit.results_json, fit.thresholds_json, fit.software_version)).encode()).hexdigest()
    known = _SNAPSHOT_HASHES.get(raw)
    if known is None:
        known = hashlib.sha256(canonical_json(fit_snapshot_document(fit)).encode()).hexdigest()
        if len(_SNAPSHOT_HASHES) >= 1024:
            _SNAPSHOT_HASHES.clear()
        _SNAPSHOT_HASHES[raw] = known
    return known


def fit_runs_row(fit: Fit) -> FitRuns | None:
    """The fit's stored per-run block row (None when absent or the fit is detached)."""
    session = object_session(fit)
    return None if session is None else session.get(FitRuns, fit.id)


def fit_runs_problem(fit: Fit) -> str | None:
    """Why the fit's stored per-run block does not match its snapshot, or None when it does
    (fits stored with their runs inside the document have no block and nothing to match)."""
    summary = json.loads(fit.results_json).get("runs")
    if not runstore.is_summary(summary):
        return None
    row = fit_runs_row(fit)
    if row is None:
        return "its per-run table is missing (deleted)"
    if runstore.sha256(row.data) != summary["sha256"] or row.sha256 != summary["sha256"]:
        return "its per-run table does not hash to the SHA-256 its snapshot holds (altered)"
    return None


def setpoint_snapshot_document(proposal: SetpointProposal, fits: list[Fit]) -> dict[str, Any]:
    """What a proposal's SHA-256 covers: inputs, result, and the fits' snapshot hashes."""
    return {"study_id": proposal.study_id,
            "fits": [{"id": f.id, "response": f.response, "snapshot_sha256": f.snapshot_sha256}
                     for f in fits],
            "goals": json.loads(proposal.goals_json), "bounds": json.loads(proposal.bounds_json),
            "fixed": json.loads(proposal.fixed_json), "result": json.loads(proposal.result_json)}


def fits_of(session: Session, proposal: SetpointProposal) -> list[Fit]:
    """The fits a proposal was made from, in its order (those still present)."""
    ids = json.loads(proposal.fit_ids_json)
    found = {f.id: f for f in session.scalars(select(Fit).where(Fit.id.in_(ids)))}
    return [found[i] for i in ids if i in found]


def setpoint_snapshot_sha256(session: Session, proposal: SetpointProposal) -> str:
    doc = setpoint_snapshot_document(proposal, fits_of(session, proposal))
    return hashlib.sha256(canonical_json(doc).encode()).hexdigest()


def confirmation_record_sha256(run: ConfirmationRun) -> str:
    """SHA-256 over what a confirmation run records: its proposal, file name, the file's
    SHA-256 and the results (observations and verdicts); sealed on the row, kept in its event."""
    return hashlib.sha256(canonical_json({
        "setpoint_id": run.setpoint_id, "filename": run.filename,
        "original_sha256": run.original_sha256, "results_json": run.results_json,
    }).encode()).hexdigest()


def rows_digest(rows: Iterable[Iterable]) -> str:
    """SHA-256 over rows of stored values (for pages that show a live integrity check)."""
    digest = hashlib.sha256()
    for row in rows:
        for value in row:
            # Type and length before each value: no two different rows share an encoding.
            raw = value if isinstance(value, bytes) else str(value).encode()
            digest.update(f"{type(value).__name__}:{len(raw)}:".encode())
            digest.update(raw)
        digest.update(b"\x1e")
    return digest.hexdigest()
