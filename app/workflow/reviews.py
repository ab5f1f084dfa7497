"""Review and electronic sign-off of fits (DESIGN.md, "Sign-off rules").

States::

    draft ─submit─▶ submitted ─sign "approved for setpoint use"─▶ approved ─▶ superseded
                              └─sign "returned for rework"─────▶ returned    └▶ withdrawn (signed)

A returned fit is final: it stays returned as the record of what was refused, and the engineer
makes a new fit with the changes and submits that one. Every state change is a conditional
``UPDATE … WHERE id = ? AND state = ? AND row_version = ?``; when no row matches, someone else
moved the fit first and the caller gets :class:`~app.workflow.Conflict`. Each step appends its
audit event (old and new state) in the same transaction.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session

from app.store import audit
from app.store.audit import canonical_json
from app.store.base import utcnow
from app.store.models import DataVersion, Fit, Signature, Study, User
from app.workflow import Conflict, Forbidden, WorkflowError, in_id_range
from app.workflow.fits import snapshot_sha256
from app.workflow.passwords import verify_password

APPROVE = "approved for setpoint use"
RETURN = "returned for rework"
WITHDRAW = "withdrawn from use"
# The meanings an approver may choose when signing a submitted fit, and the state each leads to.
SIGN_MEANINGS = {APPROVE: "approved", RETURN: "returned"}
MAX_COMMENT = 4000
VALID, INVALID, NOT_APPLYING = "valid", "invalid", "not_applying"


class SignatureRefused(Forbidden):
    """The password given at signing was wrong. Record it with :func:`record_refusal`.

    The refusal must outlive the rolled-back signing transaction, so callers write it in a
    transaction of its own (as login failures are).
    """


# The signing rules below are shared by fit sign-off and setpoint release.

def require_role(actor: User, role: str, doing: str) -> None:
    if not actor.has_role(role):
        raise Forbidden(f"Only a user with the {role} role may {doing}.", field="role")


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
    version = _expect(fit, "draft", expected_row_version, "be submitted")
    _check_current(session, fit, "submitted")
    _move(session, fit, from_state="draft", to_state="submitted", row_version=version,
          submitted_by_id=actor.id, submitted_at=utcnow())
    audit.record(session, actor=actor, action="fit.submit", object_type="fit", object_id=fit.id,
                 study_id=fit.study_id, old={"state": "draft", "row_version": version},
                 new={"state": "submitted", "row_version": fit.row_version,
                      "snapshot_sha256": fit.snapshot_sha256})
    return fit


def manifest_fields(signature: Signature) -> dict[str, Any]:
    """What a signature's manifest SHA-256 covers."""
    return {"fit_id": signature.fit_id, "signer_id": signature.signer_id,
            "printed_name": signature.printed_name,
            "signed_at": signature.signed_at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "meaning": signature.meaning, "comment": signature.comment or "",
            "snapshot_sha256": signature.snapshot_sha256}


def manifest_sha256(signature: Signature) -> str:
    return hashlib.sha256(canonical_json(manifest_fields(signature)).encode()).hexdigest()


def verify_signer_password(actor: User, password: str | None) -> None:
    """Password re-entry at the moment of signing (21 CFR 11.200(a))."""
    if not password or not verify_password(actor.password_hash, password):
        raise SignatureRefused("The password is wrong; nothing was signed.", field="password")


def _add_signature(session: Session, actor: User, fit: Fit, meaning: str,
                   comment: str) -> Signature:
    sig = Signature(fit_id=fit.id, signer_id=actor.id, printed_name=actor.full_name,
                    signed_at=utcnow(), meaning=meaning, comment=comment,
                    snapshot_sha256=fit.snapshot_sha256, manifest_sha256="")
    sig.manifest_sha256 = manifest_sha256(sig)
    session.add(sig)
    session.flush()
    return sig


def clean_comment(comment: str | None) -> str:
    text = (comment or "").strip()
    if len(text) > MAX_COMMENT:
        raise WorkflowError(f"The comment is longer than {MAX_COMMENT} characters.",
                            field="comment")
    return text


def sign(session: Session, actor: User, fit: Fit, *, meaning: str, password: str | None,
         comment: str | None = None, expected_row_version: int | None = None) -> Signature:
    """Sign a submitted fit with the approver's password again: approve it or return it.

    Approving supersedes the previously approved fit of the same study and response in the same
    transaction. Raises Forbidden (role, own fit), SignatureRefused (wrong password), Conflict
    (wrong state, stale version, altered snapshot, newer data), WorkflowError (meaning, comment).
    """
    require_role(actor, "approver", "sign a fit")
    if meaning not in SIGN_MEANINGS:
        raise WorkflowError(f"Choose a meaning for the signature: {APPROVE!r} or {RETURN!r}.",
                            field="meaning")
    comment = clean_comment(comment)
    if meaning == RETURN and not comment:
        raise WorkflowError("Returning a fit needs a comment saying what to rework.",
                            field="comment")
    if actor.id in (fit.created_by_id, fit.submitted_by_id):
        raise Forbidden("You made or submitted this fit; someone else must sign it.",
                        field="signer")
    version = _expect(fit, "submitted", expected_row_version, "be signed")
    _check_current(session, fit, "signed")
    verify_signer_password(actor, password)
    new_state = SIGN_MEANINGS[meaning]
    _move(session, fit, from_state="submitted", to_state=new_state, row_version=version)
    sig = _add_signature(session, actor, fit, meaning, comment)
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


def withdraw(session: Session, actor: User, fit: Fit, *, password: str | None, reason: str,
             expected_row_version: int | None = None) -> Signature:
    """Withdraw an approved fit from use (approved → withdrawn), signed with a reason."""
    require_role(actor, "approver", "withdraw an approved fit")
    reason = clean_comment(reason)
    if not reason:
        raise WorkflowError("Withdrawing a fit needs a reason.", field="reason")
    version = _expect(fit, "approved", expected_row_version, "be withdrawn")
    verify_signer_password(actor, password)
    _move(session, fit, from_state="approved", to_state="withdrawn", row_version=version)
    sig = _add_signature(session, actor, fit, WITHDRAW, reason)
    audit.record(session, actor=actor, action="fit.withdraw", object_type="fit",
                 object_id=fit.id, study_id=fit.study_id,
                 old={"state": "approved", "row_version": version},
                 new={"state": "withdrawn", "row_version": fit.row_version,
                      "signature": signature_summary(sig)}, reason=reason)
    return sig


def record_refusal(session: Session, actor: User, fit_id: int, doing: str, why: str) -> None:
    """Audit a refused signature (wrong password), in its own transaction."""
    fit = session.get(Fit, fit_id) if in_id_range(fit_id) else None
    audit.record(session, actor=actor, action="signature.refused", object_type="fit",
                 object_id=fit_id, study_id=None if fit is None else fit.study_id,
                 new={"attempted": doing, "why": why})


def signature_summary(sig: Signature) -> dict[str, Any]:
    return {"id": sig.id, **manifest_fields(sig), "manifest_sha256": sig.manifest_sha256}


@dataclass(frozen=True)
class SignatureCheck:
    status: str          # valid | invalid | not_applying
    reason: str


def check_signature(fit: Fit, sig: Signature) -> SignatureCheck:
    """Is the signature still bound to what it signed?

    Invalid when its manifest no longer hashes to the stored value, when it names another
    snapshot than the fit's, or when the fit's stored snapshot no longer hashes to the signed
    value. An approval of an older data version is shown as not applying.
    """
    if manifest_sha256(sig) != sig.manifest_sha256:
        return SignatureCheck(INVALID, "the signature's own record was altered")
    if sig.fit_id != fit.id or sig.snapshot_sha256 != fit.snapshot_sha256:
        return SignatureCheck(INVALID, "it names a different snapshot than this fit's")
    if snapshot_sha256(fit) != sig.snapshot_sha256:
        return SignatureCheck(INVALID, "the fit's stored snapshot no longer matches what was "
                                       "signed")
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
    return {**signature_summary(sig), "signer": sig.signer.username, "status": check.status,
            "status_reason": check.reason}


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
