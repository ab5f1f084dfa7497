"""Confirmation runs at released setpoints, each observed value checked against its 95 % PI.

The upload is a CSV or XLSX file read by app.ingest, one row per confirmation run, with a
column named after each response of the proposal (other columns are kept in the file but not
read). A response passes when every value recorded for it lies inside the prediction interval
stored with the released proposal, and fails otherwise (DESIGN.md: "Confirmation runs at the
released setpoints pass when they fall inside the prediction interval").
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from sqlalchemy.orm import Session

from app.ingest import IngestError, RawTable, read_upload
from app.ingest.raw import parse_number
from app.store import audit
from app.store.audit import canonical_json
from app.store.keys import sealing_ring
from app.store.models import ConfirmationRun, SetpointProposal, User
from app.workflow import Conflict, WorkflowError, teams
from app.workflow.reviews import VALID, require_role
from app.workflow.setpoint_signoff import confirmation_outcome, state_label
from app.workflow.setpoints import (
    _check_current,
    release_signatures,
    result_of,
    signature_check,
)


def judge(observed: dict[str, list[tuple[int, float]]], pi: dict[str, list]) -> dict[str, Any]:
    """Verdict per response: ``pass`` when every observed value lies in [PI low, PI high].

    Pure. ``observed`` maps a response to (row, value) pairs; ``pi`` to its [low, high].
    A response whose interval is missing (a fit without residual df) cannot pass.
    """
    out: dict[str, Any] = {}
    for response, values in observed.items():
        low, high = (pi.get(response) or [None, None])
        if low is None or high is None:
            out[response] = {"rows": [r for r, _ in values], "observed": [v for _, v in values],
                             "pi": [low, high], "inside": [False] * len(values),
                             "verdict": "fail",
                             "reason": "the fit has no prediction interval to check against"}
            continue
        inside = [bool(low <= v <= high) for _, v in values]
        out[response] = {"rows": [r for r, _ in values], "observed": [v for _, v in values],
                         "pi": [low, high], "inside": inside,
                         "verdict": "pass" if all(inside) else "fail"}
    return out


def read_file(data: bytes, filename: str, *, max_bytes: int = 20_000_000,
              max_cells: int = 2_000_000) -> RawTable:
    """Parse an uploaded confirmation file; errors name the file, row and column.

    Callers parse before their write transaction opens (SQLite has one writer, and a large or
    slow file must not hold other users' writes), then hand the table to :func:`record`.
    """
    if not filename:
        raise WorkflowError("Choose a file of confirmation runs (field 'file').", field="file")
    try:
        return read_upload(data, filename, None, max_bytes=max_bytes, max_cells=max_cells)
    except IngestError as exc:
        first = "; ".join(p.message for p in exc.problems[:3])
        raise WorkflowError(f"The confirmation file was not stored: {first}",
                            field="file") from None


def read_observations(raw: RawTable, responses: list[str]) -> dict[str, list[tuple[int, float]]]:
    """(row, value) pairs per response from the parsed upload; errors name row and column."""
    missing = [r for r in responses if r not in raw.frame.columns]
    if missing:
        raise WorkflowError(f"The confirmation file has no column '{missing[0]}' (it needs one "
                            f"column per response: {', '.join(responses)}).", field="file")
    observed: dict[str, list[tuple[int, float]]] = {}
    for response in responses:
        values = []
        for row, cell in raw.frame[response].items():
            if cell is None:
                continue
            number = parse_number(cell, raw.decimal)
            if number is None:
                raise WorkflowError(f"Row {row}, column '{response}': '{cell}' is not a number.",
                                    field="file")
            values.append((int(row), number))
        if not values:
            raise WorkflowError(f"Column '{response}' holds no values; record at least one "
                                "confirmation run per response.", field="file")
        observed[response] = values
    return observed


def record(session: Session, actor: User, proposal: SetpointProposal, *, data: bytes,
           filename: str, raw: RawTable) -> ConfirmationRun:
    """Store confirmation runs at released setpoints with the verdict per response.

    ``raw`` is ``data`` parsed by :func:`read_file` before the transaction. Raises Conflict
    (409) before release, when the proposal or its release signature no longer holds, or a fit
    behind it is no longer approved; WorkflowError naming the row and column for a file whose
    columns or cells do not fit the proposal.
    """
    require_role(actor, "engineer", "record confirmation runs")
    teams.require_act(session, actor, proposal.study, "record confirmation runs in it")
    if proposal.state != "released":
        raise Conflict(f"Setpoint proposal {proposal.id} is {state_label(proposal.state)}: "
                       "confirmation runs are recorded only at setpoints released for "
                       "confirmation.", field="state")
    _check_current(session, proposal, "confirmed")
    sigs = release_signatures(session, proposal)
    if not sigs or signature_check(session, proposal, sigs[-1]).status != VALID:
        raise Conflict(f"The release signature of setpoint proposal {proposal.id} is not valid.",
                       field="signature")
    result = result_of(proposal)
    pi = result["optimum"]["pi"]
    observed = read_observations(raw, list(pi))
    verdicts = judge(observed, pi)
    overall = "pass" if all(v["verdict"] == "pass" for v in verdicts.values()) else "fail"
    doc = {"responses": verdicts, "verdict": overall,
           "settings": result["optimum"]["settings"],
           "setpoint_snapshot_sha256": proposal.snapshot_sha256}
    run = ConfirmationRun(setpoint_id=proposal.id, filename=filename[:255], original_bytes=data,
                          original_sha256=hashlib.sha256(data).hexdigest(),
                          results_json=canonical_json(doc), created_by_id=actor.id)
    digest = record_sha256(run)
    run.key_id, run.seal = sealing_ring(session).seal("confirmation", digest)
    session.add(run)
    session.flush()
    moved = confirmation_outcome(session, proposal, overall)
    audit.record(session, actor=actor, action="setpoint.confirmation", object_type="setpoint",
                 object_id=proposal.id, study_id=proposal.study_id,
                 new={**moved, "confirmation_run": run.id, "filename": run.filename,
                      "original_sha256": run.original_sha256, "record_sha256": digest,
                      "verdict": overall,
                      "verdicts": {r: v["verdict"] for r, v in verdicts.items()}})
    return run


def record_sha256(run: ConfirmationRun) -> str:
    """SHA-256 over what a confirmation run records: its proposal, file name, the file's
    SHA-256 and the results (observations and verdicts); sealed on the row, kept in its event."""
    return hashlib.sha256(canonical_json({
        "setpoint_id": run.setpoint_id, "filename": run.filename,
        "original_sha256": run.original_sha256, "results_json": run.results_json,
    }).encode()).hexdigest()


def results_of(run: ConfirmationRun) -> dict[str, Any]:
    return json.loads(run.results_json)
