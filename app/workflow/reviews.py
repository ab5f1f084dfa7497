"""Review and electronic sign-off of fits (DESIGN.md, "Sign-off rules").

States::

    draft ─submit─▶ submitted ─sign "approved for setpoint use"─▶ approved ─▶ superseded
                              └─sign "returned for rework"─────▶ returned    └▶ withdrawn (signed)

A returned fit is final: it stays returned as the record of what was refused, and the engineer
makes a new fit with the changes and submits that one. Every state change is a conditional
``UPDATE … WHERE id = ? AND state = ? AND row_version = ?``; when no row matches, someone else
moved the fit first and the caller gets :class:`~app.workflow.Conflict`. Each step appends its
audit event (old and new state) in the same transaction. Signing and withdrawal follow the one
set of signing rules in :mod:`app.workflow.signing` (password before the write, separation of
duties, audited refusals, lockout).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session, object_session

from app.store import audit, keys
from app.store.base import utcnow
from app.store.models import DataVersion, Fit, Signature, Study, User
from app.workflow import Conflict, WorkflowError, signing, teams
from app.workflow.fits import snapshot_sha256
from app.workflow.signing import (
    INVALID,
    NOT_APPLYING,
    VALID,
    Reauthenticated,
    SignatureCheck,
    SignatureRefused,
    clean_comment,
    manifest_document,
    manifest_sha256,
    require_role,
    signature_summary,
)

APPROVE = "approved for setpoint use"
RETURN = "returned for rework"
WITHDRAW = "withdrawn from use"
# The meanings an approver may choose when signing a submitted fit, and the state each leads to.
SIGN_MEANINGS = {APPROVE: "approved", RETURN: "returned"}

__all__ = ["APPROVE", "INVALID", "NOT_APPLYING", "RETURN", "SIGN_MEANINGS", "VALID", "WITHDRAW",
           "SignatureCheck", "SignatureRefused", "attempt", "check_signature",
           "manifest_document", "manifest_sha256", "previous_approved", "sign",
           "signature_json", "signature_status", "signatures_json", "submit", "withdraw"]


def attempt(fit_id: int, doing: str) -> signing.Attempt:
    """What a refused sign-off or withdrawal of ``fit_id`` is recorded as."""
    return signing.Attempt(doing=doing, object_type="fit", object_id=fit_id)


def _latest_version(session: Session, study_id: int) -> int:
    return session.scalar(select(func.max(DataVersion.version))
                          .where(DataVersion.study_id == study_id)) or 0


def _check_current(session: Session, fit: Fit, doing: str) -> None:
    """Refuse a step on a snapshot that no longer hashes, or on data a newer version replaced."""
    if snapshot_sha256(fit) != fit.snapshot_sha256:
        raise Conflict(f"Fit {fit.id} no longer matches its recorded SHA-256, so it cannot be "
                       f"{doing}; report this to the auditor.", field="fit")
    latest = _latest_version(session, fit.study_id)
    if fit.data_version.version < latest:
        raise Conflict(f"Fit {fit.id} uses data version {fit.data_version.version}, but version "
                       f"{latest} is newer; fit the newest data before it is {doing}.",
                       field="data_version")


def _move(session: Session, fit: Fit, *, from_state: str, to_state: str, row_version: int,
          **values: Any) -> None:
    """The conditional update; exactly one of several concurrent callers gets rowcount 1."""
    result = session.execute(
        update(Fit)
        .where(Fit.id == fit.id, Fit.state == from_state, Fit.row_version == row_version)
        .values(state=to_state, row_version=row_version + 1, **values)
        .execution_options(synchronize_session=False))
    if result.rowcount != 1:
        raise Conflict(f"Fit {fit.id} was changed by someone else a moment ago (it is no longer "
                       f"{from_state} at version {row_version}); reload it and look again.",
                       field="row_version")
    session.refresh(fit)


def _expect(fit: Fit, state: str, expected_row_version: int | None, step: str) -> int:
    if fit.state != state:
        hint = (" A returned fit stays returned: make a new fit with the changes and submit it."
                if fit.state == "returned" else "")
        raise Conflict(f"Fit {fit.id} is {fit.state}; it must be {state} to {step}.{hint}",
                       field="state")
    if expected_row_version is not None and expected_row_version != fit.row_version:
        raise Conflict(f"Fit {fit.id} changed since you opened it (version {expected_row_version}"
                       f", now {fit.row_version}); reload it and look again.",
                       field="row_version")
    return fit.row_version


def submit(session: Session, actor: User, fit: Fit,
           expected_row_version: int | None = None) -> Fit:
    """Submit a draft fit for review (draft → submitted); the snapshot is frozen from here on."""
    require_role(actor, "engineer", "submit a fit for review")
    teams.require_act(session, actor, fit.study, "submit its fits")
    version = _expect(fit, "draft", expected_row_version, "be submitted")
    _check_current(session, fit, "submitted")
    _move(session, fit, from_state="draft", to_state="submitted", row_version=version,
          submitted_by_id=actor.id, submitted_at=utcnow())
    audit.record(session, actor=actor, action="fit.submit", object_type="fit", object_id=fit.id,
                 study_id=fit.study_id, old={"state": "draft", "row_version": version},
                 new={"state": "submitted", "row_version": fit.row_version,
                      "snapshot_sha256": fit.snapshot_sha256})
    return fit


def sign(session: Session, actor: User, fit: Fit, *, meaning: str,
         proof: Reauthenticated | None, comment: str | None = None,
         expected_row_version: int | None = None) -> Signature:
    """Sign a submitted fit: approve it or return it.

    ``proof`` is the password check made before this transaction
    (:func:`app.workflow.signing.reauthenticate`; :func:`app.workflow.signing.signed` runs the
    sequence). Approving supersedes the previously approved fit of the same study and response
    in the same transaction. Raises SignatureRefused (proof, lock), Forbidden (role, separation
    of duties), Conflict (wrong state, stale version, altered snapshot, newer data),
    WorkflowError (meaning, comment).
    """
    signing.accept(session, actor, proof)
    require_role(actor, "approver", "sign a fit")
    if meaning not in SIGN_MEANINGS:
        raise WorkflowError(f"Choose a meaning for the signature: {APPROVE!r} or {RETURN!r}.",
                            field="meaning")
    comment = clean_comment(comment)
    if meaning == RETURN and not comment:
        raise WorkflowError("Returning a fit needs a comment saying what to rework.",
                            field="comment")
    signing.check_fit_signer(actor, fit)
    version = _expect(fit, "submitted", expected_row_version, "be signed")
    _check_current(session, fit, "signed")
    new_state = SIGN_MEANINGS[meaning]
    _move(session, fit, from_state="submitted", to_state=new_state, row_version=version)
    sig = signing.add_signature(session, actor, meaning=meaning, comment=comment,
                                snapshot_sha256=fit.snapshot_sha256, fit_id=fit.id)
    audit.record(session, actor=actor, action="fit.approve" if new_state == "approved"
                 else "fit.return", object_type="fit", object_id=fit.id, study_id=fit.study_id,
                 old={"state": "submitted", "row_version": version},
                 new={"state": new_state, "row_version": fit.row_version,
                      "signature": signature_summary(sig)}, reason=comment or None)
    if new_state == "approved":
        _supersede_others(session, actor, fit)
    return sig


def _supersede_others(session: Session, actor: User, fit: Fit) -> None:
    # Lock the study after our own conditional update: a concurrent approval of another fit of
    # this study waits here, and then sees this approval when it looks for fits to supersede.
    session.execute(select(Study.id).where(Study.id == fit.study_id).with_for_update())
    older = session.scalars(select(Fit).where(
        Fit.study_id == fit.study_id, Fit.response == fit.response, Fit.state == "approved",
        Fit.id != fit.id).with_for_update()).all()
    for other in older:
        version = other.row_version
        _move(session, other, from_state="approved", to_state="superseded", row_version=version)
        audit.record(session, actor=actor, action="fit.supersede", object_type="fit",
                     object_id=other.id, study_id=other.study_id,
                     old={"state": "approved", "row_version": version},
                     new={"state": "superseded", "row_version": other.row_version,
                          "superseded_by_fit": fit.id},
                     reason=f"fit {fit.id} was approved for the same response")


def withdraw(session: Session, actor: User, fit: Fit, *, proof: Reauthenticated | None,
             reason: str, expected_row_version: int | None = None) -> Signature:
    """Withdraw an approved fit from use (approved → withdrawn), signed with a reason."""
    signing.accept(session, actor, proof)
    require_role(actor, "approver", "withdraw an approved fit")
    reason = clean_comment(reason)
    if not reason:
        raise WorkflowError("Withdrawing a fit needs a reason.", field="reason")
    version = _expect(fit, "approved", expected_row_version, "be withdrawn")
    _move(session, fit, from_state="approved", to_state="withdrawn", row_version=version)
    sig = signing.add_signature(session, actor, meaning=WITHDRAW, comment=reason,
                                snapshot_sha256=fit.snapshot_sha256, fit_id=fit.id)
    audit.record(session, actor=actor, action="fit.withdraw", object_type="fit",
                 object_id=fit.id, study_id=fit.study_id,
                 old={"state": "approved", "row_version": version},
                 new={"state": "withdrawn", "row_version": fit.row_version,
                      "signature": signature_summary(sig)}, reason=reason)
    return sig


def check_signature(fit: Fit, sig: Signature) -> SignatureCheck:
    """Is the signature still bound to what it signed?

    Invalid when its manifest no longer hashes to the stored value or its seal under the
    integrity key does not hold, when it names another snapshot than the fit's, when the fit's
    stored snapshot no longer hashes to the signed value, or when the fit's own audit events
    disagree with the fit or its signatures (:func:`app.workflow.replay.fit_disagreements`). An
    approval of an older data version is shown as not applying.
    """
    session = object_session(fit)
    if manifest_sha256(sig) != sig.manifest_sha256:
        return SignatureCheck(INVALID, "the signature's own record was altered")
    seal = keys.seal_state(session, "signature", sig.manifest_sha256, sig.key_id, sig.seal)
    if seal in (keys.BROKEN, keys.KEY_NOT_HELD) or (seal == keys.UNSEALED and fit.seal):
        return SignatureCheck(INVALID, "the signature's record is not sealed by the integrity "
                                       "key (" + keys.SEAL_PROBLEMS[seal] + ")")
    if sig.fit_id != fit.id or sig.snapshot_sha256 != fit.snapshot_sha256:
        return SignatureCheck(INVALID, "it names a different snapshot than this fit's")
    if snapshot_sha256(fit) != sig.snapshot_sha256:
        return SignatureCheck(INVALID, "the fit's stored snapshot no longer matches what was "
                                       "signed")
    if session is not None:
        from app.workflow.replay import fit_disagreements

        for found in fit_disagreements(session, fit):
            if found.kind == "fit" or (found.kind == "signature" and found.object_id == sig.id):
                return SignatureCheck(INVALID, "the audit trail disagrees: " + found.describe())
    if sig.meaning == APPROVE:
        versions = [v.version for v in fit.study.data_versions]
        if versions and max(versions) > fit.data_version.version:
            return SignatureCheck(NOT_APPLYING, f"data version {max(versions)} is newer than "
                                                f"the signed version {fit.data_version.version}")
    return SignatureCheck(VALID, "the signed snapshot is unchanged")


def signature_status(fit: Fit, sig: Signature) -> str:
    return check_signature(fit, sig).status


def signature_json(fit: Fit, sig: Signature) -> dict[str, Any]:
    """One signature with its current validity, for the API and the record package."""
    check = check_signature(fit, sig)
    return {**signature_summary(sig), "status": check.status, "status_reason": check.reason}


def signatures_json(fit: Fit) -> list[dict[str, Any]]:
    """The fit's signatures, oldest first, each with its current validity."""
    return [signature_json(fit, sig) for sig in fit.signatures]


def previous_approved(session: Session, fit: Fit) -> Fit | None:
    """The fit of the same study and response approved most recently before this one."""
    before = select(func.min(Signature.signed_at)).where(Signature.fit_id == fit.id,
                                                        Signature.meaning == APPROVE)
    mine = session.scalar(before)
    query = (select(Fit).join(Signature, Signature.fit_id == Fit.id)
             .where(Fit.study_id == fit.study_id, Fit.response == fit.response,
                    Fit.id != fit.id, Signature.meaning == APPROVE))
    if mine is not None:
        query = query.where(Signature.signed_at < mine)
    return session.scalars(query.order_by(Signature.signed_at.desc()).limit(1)).first()
