"""Electronic signatures: one set of rules for fit sign-off, fit withdrawal and setpoint release
(DESIGN.md, "Sign-off rules"; after 21 CFR 11.50, 11.70, 11.200 and EU GMP Annex 11 §14).

What a signature is
    A :class:`~app.store.models.Signature` row: signer, printed name, server UTC time, meaning,
    comment and the SHA-256 of what was signed, bound together by a manifest SHA-256
    (:func:`manifest_sha256`). Wherever a signature is shown, the printed name goes with the
    user name (:func:`signature_summary`).

Re-authentication
    The password is checked in a *read* session before the write transaction opens
    (:func:`reauthenticate`): argon2 is slow on purpose, and SQLite has one writer, so a check
    inside the write transaction would hold every other user's writes while it runs. The check
    yields a :class:`Reauthenticated` proof; the signing service, inside its write transaction,
    hands it to :func:`accept`, which re-checks what may have changed meanwhile (lock, password)
    and starts the failure counter again. :func:`signed` runs the whole sequence for a caller.

Lockout
    Signing and the password change on the account page share one counter of consecutive wrong
    passwords per account (``users.reauth_failures``). :class:`Lockout` consecutive failures
    lock both for a while or until an admin unlocks (``accounts.unlock``). Every failure and
    the lock are audited.

Refusals
    Every refused attempt (wrong password, locked, separation of duties, stale snapshot, wrong
    state, bad input) is written by :func:`record_refusal` in a transaction of its own, so it
    outlives the rolled-back signing transaction, as failed logins do.
"""

from __future__ import annotations

import hashlib
import unicodedata
from collections.abc import Callable, Iterable, Mapping
from contextlib import AbstractContextManager
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, TypeVar

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from app.store import audit
from app.store.audit import canonical_json
from app.store.base import utcnow
from app.store.keys import sealing_ring
from app.store.models import Fit, SetpointProposal, Signature, User
from app.workflow import Conflict, Forbidden, NotFound, WorkflowError, in_id_range
from app.workflow.passwords import verify_password

MAX_COMMENT = 4000
VALID, INVALID, NOT_APPLYING = "valid", "invalid", "not_applying"

# Why an attempt was refused, as the audit trail records it.
WRONG_PASSWORD = "wrong password"  # noqa: S105  (a refusal cause, not a secret)
LOCKED = "locked"
DUTIES = "separation of duties"
STALE = "stale"
WRONG_STATE = "wrong state"
NO_ROLE = "role"
BAD_INPUT = "invalid request"

# The separation-of-duties rules, in the words the review and setpoint pages show.
SEPARATION_OF_DUTIES = (
    "Nobody approves or returns a fit they made, submitted, or whose data version they uploaded.",
    "Nobody signs a setpoint sheet (release, confirmation, return, withdrawal) they proposed, "
    "or one that uses a fit they made.",
    "Nobody grants roles to themself.",
    "No account holds the admin and the approver role together.",
    "Printed names are unique among active users; every signature shows the printed name "
    "with the user name.",
)

WRONG_SIGNING_PASSWORD = "The password is wrong; nothing was signed."  # noqa: S105
# A proof older than this is not accepted: the write follows the check at once.
PROOF_MAX_AGE = timedelta(minutes=2)


class SignatureRefused(Forbidden):
    """The password given at signing (or to change the password) was wrong."""

    cause = WRONG_PASSWORD

    def __init__(self, message: str = WRONG_SIGNING_PASSWORD, *, field: str = "password"):
        super().__init__(message, field=field)


class ReauthLocked(SignatureRefused):
    """Too many consecutive wrong passwords: signing and password change wait for the lock."""

    cause = LOCKED


class ProofRejected(SignatureRefused):
    """The password check does not fit this write (another user, too old, password changed)."""

    cause = "password check not current"


class DutiesConflict(Forbidden):
    """Separation of duties refuses this person for this step."""

    cause = DUTIES


class PrintedNameTaken(Conflict):
    """An active user already carries this printed name (one of the separation rules)."""

    cause = DUTIES


# ---- lockout ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class Lockout:
    """Consecutive wrong passwords that lock signing and password change, and for how long."""

    failures: int = 5
    minutes: int = 15

    def __post_init__(self) -> None:
        if self.failures < 1 or self.minutes < 1:
            raise ValueError("SIGN_LOCK_FAILURES and SIGN_LOCK_MINUTES must be at least 1")

    @classmethod
    def from_config(cls, config: Mapping[str, Any]) -> Lockout:
        return cls(failures=int(config.get("SIGN_LOCK_FAILURES", cls.failures)),
                   minutes=int(config.get("SIGN_LOCK_MINUTES", cls.minutes)))


def _iso(at: datetime) -> str:
    return at.strftime("%Y-%m-%dT%H:%M:%SZ")


def locked_until(user: User, now: datetime | None = None) -> datetime | None:
    """When the account's lock ends, or None when it is not locked."""
    until = user.reauth_locked_until
    return until if until is not None and until > (now or utcnow()) else None


def _locked(until: datetime) -> ReauthLocked:
    return ReauthLocked(f"Signing and password changes are locked for this account until "
                        f"{until.strftime('%Y-%m-%d %H:%M')} UTC after too many wrong "
                        "passwords in a row; an admin can unlock it sooner. Nothing was signed "
                        "or changed.")


def _count_failure(session: Session, user: User, limits: Lockout,
                   now: datetime) -> tuple[int, datetime | None]:
    """Add one failure; at the limit, lock and start the count again. (failures, lock end)."""
    session.execute(update(User).where(User.id == user.id)
                    .values(reauth_failures=User.reauth_failures + 1)
                    .execution_options(synchronize_session=False))
    session.refresh(user)
    failures = user.reauth_failures
    if failures < limits.failures:
        return failures, None
    until = now + timedelta(minutes=limits.minutes)
    user.reauth_failures = 0
    user.reauth_locked_until = until
    session.flush()
    return failures, until


# ---- re-authentication -----------------------------------------------------------------------

@dataclass(frozen=True)
class Reauthenticated:
    """Proof that ``user_id`` entered the password (the one hashed as ``password_hash``) at
    ``at``. Made only by :func:`reauthenticate`; checked again by :func:`accept`."""

    user_id: int
    password_hash: str
    at: datetime


def reauthenticate(session: Session, user: User | None, password: str | None, *,
                   refusal: str = WRONG_SIGNING_PASSWORD,
                   now: datetime | None = None) -> Reauthenticated:
    """Check the password again (21 CFR 11.200(a)). Only reads: run it in a read session.

    Raises :class:`ReauthLocked` while the account is locked (the password is then not even
    checked) and :class:`SignatureRefused` for a wrong password or an inactive account.
    """
    now = now or utcnow()
    if user is None or not user.active:
        raise SignatureRefused(refusal)
    until = locked_until(user, now)
    if until is not None:
        raise _locked(until)
    if not password or not verify_password(user.password_hash, password):
        raise SignatureRefused(refusal)
    return Reauthenticated(user_id=user.id, password_hash=user.password_hash, at=now)


def accept(session: Session, actor: User, proof: Reauthenticated | None, *,
           now: datetime | None = None) -> None:
    """Inside the write transaction: the proof is this actor's and current, and the account was
    not locked meanwhile. Then the failure counter starts again (rolled back with the write when
    a later rule refuses it)."""
    now = now or utcnow()
    if (not isinstance(proof, Reauthenticated) or proof.user_id != actor.id
            or proof.password_hash != actor.password_hash or now - proof.at > PROOF_MAX_AGE):
        raise ProofRejected("The password check does not belong to this step any more; enter "
                            "the password again.")
    until = locked_until(actor, now)
    if until is not None:
        raise _locked(until)
    if actor.reauth_failures or actor.reauth_locked_until is not None:
        actor.reauth_failures = 0
        actor.reauth_locked_until = None
        session.flush()


# ---- refusals --------------------------------------------------------------------------------

@dataclass(frozen=True)
class Attempt:
    """What someone tried: ``doing`` on one object, recorded under ``action`` when refused."""

    doing: str                 # sign, withdraw, release, change password
    object_type: str           # fit, setpoint, user
    object_id: int
    action: str = "signature.refused"


_STUDY_OF = {"fit": Fit, "setpoint": SetpointProposal}


def cause_of(exc: WorkflowError) -> str:
    """The refusal's cause in the audit trail's words."""
    cause = getattr(exc, "cause", None)
    if cause:
        return cause
    if isinstance(exc, Forbidden):
        return NO_ROLE if exc.field == "role" else DUTIES
    if isinstance(exc, Conflict):
        return WRONG_STATE if exc.field == "state" else STALE
    return BAD_INPUT


def record_refusal(session: Session, actor: User, attempt: Attempt, exc: WorkflowError,
                   limits: Lockout = Lockout(), *, password_ok: bool = False,
                   now: datetime | None = None) -> None:
    """Audit a refused attempt in its own transaction.

    A wrong password counts towards the lock, and reaching the limit locks the account (audited
    as ``user.reauth_locked``). A right password (``password_ok``) ends the run of failures
    even when the step itself was refused for another reason.
    """
    now = now or utcnow()
    cause = cause_of(exc)
    new: dict[str, Any] = {"attempted": attempt.doing, "cause": cause, "why": exc.message}
    until = None
    if cause == WRONG_PASSWORD:
        failures, until = _count_failure(session, actor, limits, now)
        new["consecutive_failures"] = failures
    elif password_ok and cause != LOCKED and actor.reauth_failures:
        actor.reauth_failures = 0
    model = _STUDY_OF.get(attempt.object_type)
    row = (session.get(model, attempt.object_id)
           if model is not None and in_id_range(attempt.object_id) else None)
    audit.record(session, actor=actor, action=attempt.action, object_type=attempt.object_type,
                 object_id=attempt.object_id, study_id=getattr(row, "study_id", None), new=new)
    if until is not None:
        audit.record(session, actor=actor, action="user.reauth_locked", object_type="user",
                     object_id=actor.id, new={"locked_until": _iso(until),
                                              "consecutive_failures": limits.failures,
                                              "after": attempt.doing})


T = TypeVar("T")
Sessions = Callable[[], AbstractContextManager[Session]]


def signed(read: Sessions, write: Sessions, *, actor_id: int, password: str | None,
           attempt: Attempt, act: Callable[[Session, User, Reauthenticated], T],
           limits: Lockout = Lockout(), refusal: str = WRONG_SIGNING_PASSWORD) -> T:
    """Re-authenticate in a ``read()`` session, then run ``act`` in one ``write()`` transaction.

    ``act(session, actor, proof)`` calls the signing service (which passes ``proof`` to
    :func:`accept`) and returns what the caller needs from inside the transaction. Any refusal
    but a missing object is audited in a second ``write()`` transaction and raised again.
    """
    proof = None
    try:
        with read() as session:
            proof = reauthenticate(session, session.get(User, actor_id), password,
                                   refusal=refusal)
        with write() as session:
            return act(session, session.get(User, actor_id), proof)
    except NotFound:
        raise
    except WorkflowError as exc:
        with write() as session:
            record_refusal(session, session.get(User, actor_id), attempt, exc, limits,
                           password_ok=proof is not None)
        raise


# ---- separation of duties --------------------------------------------------------------------

def require_role(actor: User, role: str, doing: str) -> None:
    if not actor.has_role(role):
        raise Forbidden(f"Only a user with the {role} role may {doing}.", field="role")


def check_fit_signer(actor: User, fit: Fit) -> None:
    """Nobody approves or returns a fit they made, submitted, or whose data they uploaded."""
    if actor.id in (fit.created_by_id, fit.submitted_by_id):
        raise DutiesConflict("You made or submitted this fit; someone else must sign it.",
                             field="signer")
    if actor.id == fit.data_version.created_by_id:
        raise DutiesConflict(f"You uploaded data version {fit.data_version.version}, which this "
                             "fit uses; someone else must sign it.", field="signer")


def check_releaser(actor: User, proposal: SetpointProposal, fits: Iterable[Fit]) -> None:
    """Nobody signs a setpoint sheet (release, confirmation, return, withdrawal) they
    proposed, or one that uses a fit they made."""
    if actor.id == proposal.created_by_id:
        raise DutiesConflict("You proposed these setpoints; someone else must sign them.",
                             field="signer")
    own = [str(f.id) for f in fits if f.created_by_id == actor.id]
    if own:
        raise DutiesConflict(f"You made fit {', '.join(own)}, which these setpoints use; "
                             "someone else must sign them.", field="signer")


def check_role_change(actor: User | None, user: User, roles: Iterable[str]) -> None:
    """Nobody grants roles to themself; admin never goes with approver. ``actor`` None is the
    command line, run by whoever administers the server."""
    if actor is not None and actor.id == user.id:
        raise DutiesConflict("Nobody changes their own roles; another admin must do it.",
                             field="roles")
    check_role_combination(roles)


def check_role_combination(roles: Iterable[str]) -> None:
    if {"admin", "approver"} <= set(roles):
        raise DutiesConflict("One account cannot hold both the admin and the approver role: "
                             "an admin could otherwise grant and use signing rights alone.",
                             field="roles")


def printed_name_key(full_name: str) -> str:
    """Printed names compare without case, with Unicode and spacing normalised."""
    return " ".join(unicodedata.normalize("NFKC", full_name).casefold().split())


def check_printed_name(session: Session, full_name: str, *, user_id: int | None = None) -> None:
    """Refuse a printed name that an active user (other than ``user_id``) already carries."""
    key = printed_name_key(full_name)
    for other_id, username, name in session.execute(
            select(User.id, User.username, User.full_name).where(User.active.is_(True))):
        if other_id != user_id and printed_name_key(name) == key:
            raise PrintedNameTaken(f"The active user '{username}' already has the printed name "
                                   f"'{name}'; printed names identify signers and must be "
                                   "unique.", field="full_name")


# ---- the signature and its manifest ----------------------------------------------------------

def clean_comment(comment: str | None) -> str:
    text = (comment or "").strip()
    if len(text) > MAX_COMMENT:
        raise WorkflowError(f"The comment is longer than {MAX_COMMENT} characters.",
                            field="comment")
    return text


def manifest_document(sig: Signature) -> dict[str, Any]:
    """What a signature's manifest SHA-256 covers. A release signature adds its setpoint id."""
    doc = {"fit_id": sig.fit_id, "signer_id": sig.signer_id, "printed_name": sig.printed_name,
           "signed_at": sig.signed_at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
           "meaning": sig.meaning, "comment": sig.comment or "",
           "snapshot_sha256": sig.snapshot_sha256}
    if sig.setpoint_id is not None:
        doc["setpoint_id"] = sig.setpoint_id
    return doc


def manifest_sha256(sig: Signature) -> str:
    return hashlib.sha256(canonical_json(manifest_document(sig)).encode()).hexdigest()


def add_signature(session: Session, actor: User, *, meaning: str, comment: str,
                  snapshot_sha256: str, fit_id: int | None = None,
                  setpoint_id: int | None = None) -> Signature:
    sig = Signature(fit_id=fit_id, setpoint_id=setpoint_id, signer_id=actor.id,
                    printed_name=actor.full_name, signed_at=utcnow(), meaning=meaning,
                    comment=comment, snapshot_sha256=snapshot_sha256, manifest_sha256="")
    sig.manifest_sha256 = manifest_sha256(sig)
    sig.key_id, sig.seal = sealing_ring(session).seal("signature", sig.manifest_sha256)
    session.add(sig)
    session.flush()
    return sig


def signature_summary(sig: Signature) -> dict[str, Any]:
    """The manifest, its hash and the signer's user name beside the printed name."""
    return {"id": sig.id, **manifest_document(sig), "signer": sig.signer.username,
            "manifest_sha256": sig.manifest_sha256}


@dataclass(frozen=True)
class SignatureCheck:
    status: str          # valid | invalid | not_applying
    reason: str
