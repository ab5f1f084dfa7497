"""Confirmation runs at released setpoints, judged by the mean of the runs.

The upload is a CSV or XLSX file read by app.ingest, one row per confirmation run, with a
column named after each response of the proposal and, when the runs recorded them, a column
named after each factor with the setting actually run (other columns are kept in the file but
not read). The judging is :func:`app.analysis.confirm.judge_confirmation` (DESIGN.md: "the mean
of m runs at the settings actually run is judged against the interval for the mean of m future
observations; each run against the single-observation interval is shown as information"), with
the fits behind the proposal and the released settings; a set run too far from the released
settings for the tolerance set at release is refused with a WorkflowError naming the factor.

Runs recorded before that rule was each checked against the single-observation interval stored
with the proposal (:func:`judge`); their documents have no ``rule`` and are still checked that
way by the record package.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from sqlalchemy.orm import Session

from app.analysis import AnalysisError
from app.analysis.confirm import ConfirmationRefused, judge_confirmation
from app.ingest import IngestError, RawTable, read_upload
from app.ingest.raw import parse_number
from app.store import audit
from app.store.audit import canonical_json
from app.store.keys import sealing_ring
from app.store.models import ConfirmationRun, SetpointProposal, User
from app.workflow import Conflict, WorkflowError, in_id_range, teams
from app.workflow.digests import confirmation_record_sha256 as record_sha256
from app.workflow.fits import results_of as fit_results_of
from app.workflow.reviews import VALID, require_role
from app.workflow.setpoint_signoff import confirmation_outcome, state_label, tolerance_of
from app.workflow.setpoints import (
    _check_current,
    _finite,
    fits_of,
    release_signatures,
    result_of,
    signature_check,
)


def judge(observed: dict[str, list[tuple[int, float]]], pi: dict[str, list]) -> dict[str, Any]:
    """The rule before the mean of the runs was judged: each value against the stored PI.

    Kept only so that the record package can re-check runs recorded under it. Pure.
    ``observed`` maps a response to (row, value) pairs; ``pi`` to its [low, high]. A response
    whose interval is missing (a fit without residual df) cannot pass.
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


def _text_cell(raw: RawTable, row: Any, column: str) -> str | None:
    """A categorical factor's level as written (surrounding spaces dropped); None if empty."""
    cell = raw.frame.at[row, column]
    text = None if cell is None else str(cell).strip()
    return text or None


def _number_cell(raw: RawTable, row: Any, column: str) -> float | None:
    cell = raw.frame.at[row, column]
    if cell is None:
        return None
    number = parse_number(cell, raw.decimal)
    if number is None:
        raise WorkflowError(f"Row {row}, column '{column}': '{cell}' is not a number.",
                            field="file")
    return number


def read_runs(raw: RawTable, responses: list[str], factors: list[str],
              categorical: tuple[str, ...] = ()) -> list[dict[str, Any]]:
    """One entry per confirmation run: {row, settings: {factor: value}, responses: {r: value}}.

    A run is a row with a value for at least one response. Factor columns are read when the
    file has them (a factor without a column is left out of ``settings``, so the judging
    assumes its released value and says so); a factor column must give every run a value.
    Errors name the row and column.
    """
    read_observations(raw, responses)    # the response columns: present, numeric, not empty
    columns = [f for f in factors if f in raw.frame.columns]
    runs = []
    for row in raw.frame.index:
        values = {r: _number_cell(raw, row, r) for r in responses}
        if all(v is None for v in values.values()):
            continue
        settings = {}
        for factor in columns:
            value = (_text_cell(raw, row, factor) if factor in categorical
                     else _number_cell(raw, row, factor))
            if value is None:
                raise WorkflowError(f"Row {row}, column '{factor}': the setting is missing; the "
                                    "file records this factor, so every run needs its value.",
                                    field="file")
            settings[factor] = value
        runs.append({"row": int(row), "settings": settings,
                     "responses": {r: v for r, v in values.items() if v is not None}})
    return runs


def _check_tolerance(tolerance: dict[str, float] | None, factors: list[str]) -> None:
    for factor, limit in (tolerance or {}).items():
        if factor not in factors:
            raise WorkflowError(f"The tolerance names factor '{factor}', which the setpoints "
                                f"do not set ({', '.join(factors)}).", field="tolerance")
        if limit is not None and (isinstance(limit, bool)
                                  or not isinstance(limit, (int, float)) or not limit >= 0):
            raise WorkflowError(f"The tolerance of '{factor}' must be a number of at least 0.",
                                field="tolerance")


def record(session: Session, actor: User, proposal: SetpointProposal, *, data: bytes,
           filename: str, raw: RawTable,
           tolerance: dict[str, float] | None = None) -> ConfirmationRun:
    """Store confirmation runs at released setpoints with the verdict per response.

    ``raw`` is ``data`` parsed by :func:`read_file` before the transaction. ``tolerance``
    ({factor: largest allowed deviation from the released value, natural units}) is the one
    the approver set at release; None (or a factor left out) sets no limit. Raises Conflict
    (409) before release, when the proposal or its release signature no longer holds, or a fit
    behind it is no longer approved; WorkflowError naming the row and column for a file whose
    columns or cells do not fit the proposal, and naming the factor, the value run, the
    released value and the tolerance when the runs were made too far from the setpoints.
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
    released = result["optimum"]["settings"]
    if tolerance is None:
        tolerance = tolerance_of(session, proposal)
    _check_tolerance(tolerance, list(released))
    models = {f.response: fit_results_of(f) for f in fits_of(session, proposal)}
    runs = read_runs(raw, list(models), list(released),
                     tuple(n for n, v in released.items() if isinstance(v, str)))
    try:
        judged = judge_confirmation(models, released, runs, tolerance)
    except ConfirmationRefused as exc:
        raise WorkflowError(f"The confirmation runs were not judged: {exc}.",
                            field="file") from None
    except AnalysisError as exc:
        raise WorkflowError(f"The confirmation file was not judged: {exc}.",
                            field="file") from None
    doc = {**_finite(judged), "setpoint_snapshot_sha256": proposal.snapshot_sha256}
    verdicts, overall = doc["responses"], doc["verdict"]
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


REFUSED = "setpoint.confirmation_refused"


def record_refusal(session: Session, actor: User, proposal_id: int, filename: str,
                   exc: WorkflowError) -> None:
    """Audit refused confirmation runs (a file that does not fit, settings beyond the
    tolerance, a proposal not released for confirmation) in a transaction of its own: the
    refused one was rolled back."""
    found = (session.get(SetpointProposal, proposal_id) if in_id_range(proposal_id) else None)
    audit.record(session, actor=actor, action=REFUSED, object_type="setpoint",
                 object_id=proposal_id, study_id=getattr(found, "study_id", None),
                 new={"attempted": "record confirmation runs", "filename": filename[:255],
                      "field": exc.field, "why": exc.message})


def results_of(run: ConfirmationRun) -> dict[str, Any]:
    return json.loads(run.results_json)
