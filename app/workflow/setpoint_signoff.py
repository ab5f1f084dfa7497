"""The setpoint sheet's sign-off: release for confirmation, confirmation for production, return,
withdrawal. Each is a signature by an approver and one service here.

States (the stored value, then the words pages use)::

    draft      proposed ─┬─ sign "released for confirmation" ─▶ released
                         └─ sign "returned" (with reasons) ─────▶ returned
    released   released for confirmation
                 ─ confirmation runs that fail (app.workflow.confirmations) ─▶ failed
                 ─ sign "confirmed for production" (the latest runs passed) ─▶ confirmed
    failed     confirmation failed
    confirmed  confirmed for production
    released | failed | confirmed ─ sign "withdrawn" (with a reason) ─▶ withdrawn

Only "confirmed" is for production use; "released" is for confirmation runs only, and a set
whose confirmation failed or that was withdrawn never shows as released or confirmed
(:func:`state_label`). At release the approver sets how far the settings of a confirmation run
may stray from the released ones (``tolerance``, natural units per factor); it is kept in the
release event, so it is sealed with the trail and read back from there (:func:`tolerance_of`).

Every signature follows app.workflow.signing: the password again (checked before the write),
separation of duties (nobody signs a sheet they proposed or one that uses a fit they made),
audited refusals; the move is a conditional update on (state, row_version).
"""

from __future__ import annotations

import json
import math
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from app.store import audit
from app.store.models import AuditEvent, SetpointProposal, Signature, User
from app.workflow import Conflict, WorkflowError, signing
from app.workflow.signing import (
    Reauthenticated,
    clean_comment,
    require_role,
    signature_summary,
)

RELEASE = "released for confirmation"
CONFIRM = "confirmed for production"
RETURN = "returned"
WITHDRAW = "withdrawn"
# The meaning a release carried before confirmation came first; such signatures stay on
# record and their proposals count as released for confirmation.
EARLIER_RELEASE = "released for production use"
MEANINGS = (RELEASE, CONFIRM, RETURN, WITHDRAW)

# meaning → (states it may start from, state it leads to, audit action, what it is called)
TRANSITIONS: dict[str, tuple[tuple[str, ...], str, str, str]] = {
    RELEASE: (("draft",), "released", "setpoint.release", "release these setpoints for "
              "confirmation"),
    RETURN: (("draft",), "returned", "setpoint.return", "return this proposal"),
    CONFIRM: (("released",), "confirmed", "setpoint.confirm", "confirm these setpoints for "
              "production"),
    WITHDRAW: (("released", "failed", "confirmed"), "withdrawn", "setpoint.withdraw",
               "withdraw these setpoints"),
}
STATE_LABELS = {
    "draft": "proposed",
    "released": "released for confirmation",
    "failed": "confirmation failed",
    "confirmed": "confirmed for production",
    "returned": "returned",
    "withdrawn": "withdrawn",
}
NEEDS_REASON = (RETURN, WITHDRAW)


def state_label(state: str) -> str:
    """The words every page, export and package uses for a proposal's state."""
    return STATE_LABELS.get(state, state)


def for_production(proposal: SetpointProposal) -> bool:
    return proposal.state == "confirmed"


def next_meanings(proposal: SetpointProposal) -> list[str]:
    """The signatures the proposal's state allows next."""
    return [m for m, (starts, *_rest) in TRANSITIONS.items() if proposal.state in starts]


def attempt(proposal_id: int, meaning: str = RELEASE) -> signing.Attempt:
    """What a refused signature on setpoint sheet ``proposal_id`` is recorded as."""
    doing = {RELEASE: "release", CONFIRM: "confirm", RETURN: "return",
             WITHDRAW: "withdraw"}.get(meaning, "sign")
    return signing.Attempt(doing=doing, object_type="setpoint", object_id=proposal_id)


# ---- the tolerance set at release ---------------------------------------------------------------

def parse_tolerance(raw: Any, factors: list[str]) -> dict[str, float]:
    """``{factor: largest allowed deviation, natural units}``, one positive number per factor."""
    if not isinstance(raw, dict):
        raise WorkflowError("Releasing for confirmation needs the tolerance: for each factor, "
                            "how far a confirmation run's setting may lie from the released "
                            "one.", field="tolerance")
    unknown = sorted(set(raw) - set(factors))
    if unknown:
        raise WorkflowError(f"The tolerance names no factor of these setpoints: "
                            f"{', '.join(unknown)}.", field=f"tolerance.{unknown[0]}")
    out = {}
    for name in factors:
        value = raw.get(name)
        field = f"tolerance.{name}"
        if value is None or value == "":
            raise WorkflowError(f"Give the tolerance for {name}.", field=field)
        if isinstance(value, bool):
            raise WorkflowError(f"The tolerance for {name} must be a number.", field=field)
        try:
            number = float(str(value).replace(",", ".")) if isinstance(value, str) else \
                float(value)
        except (TypeError, ValueError):
            raise WorkflowError(f"The tolerance for {name} must be a number (got {value!r}).",
                                field=field) from None
        if not math.isfinite(number) or number < 0:
            raise WorkflowError(f"The tolerance for {name} must be zero or more and finite.",
                                field=field)
        out[name] = number
    return out


def tolerance_of(session: Session, proposal: SetpointProposal) -> dict[str, float] | None:
    """The tolerance the approver set at release, from the (sealed) release event; None for a
    proposal not released, or released before tolerances were set."""
    table = AuditEvent.__table__
    new_json = session.scalar(
        select(table.c.new_json).where(table.c.action == "setpoint.release",
                                       table.c.object_type == "setpoint",
                                       table.c.object_id == str(proposal.id))
        .order_by(table.c.seq.desc()).limit(1))
    if new_json is None:
        return None
    tolerance = json.loads(new_json).get("tolerance")
    return None if tolerance is None else {k: float(v) for k, v in tolerance.items()}


# ---- the one signing service --------------------------------------------------------------------

def _latest_confirmation(proposal: SetpointProposal) -> dict[str, Any] | None:
    from app.workflow.confirmations import results_of

    runs = list(proposal.confirmations)
    return None if not runs else results_of(runs[-1])


def sign(session: Session, actor: User, proposal: SetpointProposal, *, meaning: str,
         proof: Reauthenticated | None, comment: str | None = None,
         tolerance: Any = None, expected_row_version: int | None = None) -> Signature:
    """An approver signs the setpoint sheet; ``meaning`` selects the transition.

    ``proof`` is the password check made before this transaction
    (:func:`app.workflow.signing.signed` runs the sequence). Raises SignatureRefused (proof,
    lock), Forbidden (role, separation of duties), Conflict (wrong state, changed meanwhile,
    altered snapshot, a fit no longer approved, confirmation not passed), WorkflowError
    (meaning, comment, reason, tolerance).
    """
    from app.workflow.setpoints import _check_current, continuous_settings, fits_of

    signing.accept(session, actor, proof)
    if meaning == EARLIER_RELEASE:
        meaning = RELEASE
    if meaning not in TRANSITIONS:
        raise WorkflowError("Choose the meaning of the signature: "
                            + ", ".join(repr(m) for m in MEANINGS) + ".", field="meaning")
    starts, to_state, action, doing = TRANSITIONS[meaning]
    require_role(actor, "approver", doing)
    comment = clean_comment(comment)
    if meaning in NEEDS_REASON and not comment:
        raise WorkflowError(f"To {doing}, give the reason (it is kept with the signature).",
                            field="comment")
    signing.check_releaser(actor, proposal, fits_of(session, proposal))
    if proposal.state not in starts:
        raise Conflict(f"Setpoint proposal {proposal.id} is {state_label(proposal.state)}; "
                       f"only a proposal that is "
                       f"{' or '.join(state_label(s) for s in starts)} can be signed "
                       f"'{meaning}'.", field="state")
    version = proposal.row_version
    if expected_row_version is not None and expected_row_version != version:
        raise Conflict(f"Setpoint proposal {proposal.id} changed since you opened it; reload "
                       "it and look again.", field="row_version")
    extra: dict[str, Any] = {}
    if meaning == RELEASE:
        _check_current(session, proposal, "released")
        extra["tolerance"] = parse_tolerance(tolerance, continuous_settings(proposal))
    elif meaning == CONFIRM:
        _check_current(session, proposal, "confirmed for production")
        latest = _latest_confirmation(proposal)
        if latest is None:
            raise Conflict(f"Setpoint proposal {proposal.id} has no confirmation runs yet; it "
                           "is confirmed for production only after they pass.",
                           field="confirmations")
        if latest.get("verdict") != "pass":
            raise Conflict(f"The latest confirmation runs of setpoint proposal {proposal.id} "
                           "did not pass.", field="confirmations")
    moved = session.execute(
        update(SetpointProposal)
        .where(SetpointProposal.id == proposal.id, SetpointProposal.state == proposal.state,
               SetpointProposal.row_version == version)
        .values(state=to_state, row_version=version + 1)
        .execution_options(synchronize_session=False))
    if moved.rowcount != 1:
        raise Conflict(f"Setpoint proposal {proposal.id} was changed by someone else a moment "
                       "ago; reload it and look again.", field="row_version")
    from_state = proposal.state
    session.refresh(proposal)
    sig = signing.add_signature(session, actor, meaning=meaning, comment=comment,
                                snapshot_sha256=proposal.snapshot_sha256,
                                setpoint_id=proposal.id)
    audit.record(session, actor=actor, action=action, object_type="setpoint",
                 object_id=proposal.id, study_id=proposal.study_id,
                 old={"state": from_state, "row_version": version},
                 new={"state": to_state, "row_version": proposal.row_version,
                      "signature": signature_summary(sig), **extra},
                 reason=comment or None)
    return sig


def confirmation_outcome(session: Session, proposal: SetpointProposal,
                         verdict: str) -> dict[str, Any]:
    """After confirmation runs are stored: a failed verdict moves the proposal from released to
    failed (in the caller's transaction). Returns the state change for the audit event."""
    if verdict == "pass":
        return {}
    version = proposal.row_version
    moved = session.execute(
        update(SetpointProposal)
        .where(SetpointProposal.id == proposal.id, SetpointProposal.state == "released",
               SetpointProposal.row_version == version)
        .values(state="failed", row_version=version + 1)
        .execution_options(synchronize_session=False))
    if moved.rowcount != 1:
        raise Conflict(f"Setpoint proposal {proposal.id} was changed by someone else a moment "
                       "ago; reload it and look again.", field="row_version")
    session.refresh(proposal)
    return {"state": "failed", "row_version": proposal.row_version}
