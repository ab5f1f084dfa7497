"""Typed tables. Rows that a signature or the audit trail relies on are never updated in place."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import (
    Boolean,
    Float,
    ForeignKey,
    Integer,
    LargeBinary,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column, relationship

from app.store.base import Base, UTCDateTime, utcnow

ROLES = ("engineer", "approver", "auditor", "admin")


class User(Base):
    __tablename__ = "users"

    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(64), unique=True)
    full_name: Mapped[str] = mapped_column(String(200))
    password_hash: Mapped[str] = mapped_column(String(200))
    roles: Mapped[str] = mapped_column(String(200), default="")
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    # Set for a password someone else chose (a one-time password): change it at first sign-in.
    must_change_password: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    password_changed_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # Consecutive wrong passwords at signing or at a password change (one counter for both),
    # and the end of the lock they led to (app.workflow.signing).
    reauth_failures: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    reauth_locked_until: Mapped[datetime | None] = mapped_column(UTCDateTime)

    sessions: Mapped[list[UserSession]] = relationship(back_populates="user")

    @property
    def role_set(self) -> frozenset[str]:
        return frozenset(r for r in self.roles.split(",") if r)

    def has_role(self, *roles: str) -> bool:
        return bool(self.role_set.intersection(roles))


class UserSession(Base):
    """A server-side login session; the cookie holds a random token whose SHA-256 is the key."""

    __tablename__ = "user_sessions"

    id: Mapped[int] = mapped_column(primary_key=True)
    token_sha256: Mapped[str] = mapped_column(String(64), unique=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_seen_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    remote_addr: Mapped[str | None] = mapped_column(String(64))

    user: Mapped[User] = relationship(back_populates="sessions")


class ApiToken(Base):
    """A personal API token: only its SHA-256 is kept. ``scope`` is "read" (GET and HEAD only)
    or "read-write"; past ``expires_at`` it is refused like an unknown token. ``last_used_at``
    is written at most once a minute (app.web.access)."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    name: Mapped[str] = mapped_column(String(100))
    token_sha256: Mapped[str] = mapped_column(String(64), unique=True)
    prefix: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    last_used_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    scope: Mapped[str] = mapped_column(String(16), default="read-write",
                                       server_default="read-write")
    expires_at: Mapped[datetime] = mapped_column(UTCDateTime)

    user: Mapped[User] = relationship()


class LoginFailure(Base):
    """Recent failed logins, by account and by address, for throttling."""

    __tablename__ = "login_failures"

    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(64), index=True)
    remote_addr: Mapped[str | None] = mapped_column(String(64), index=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow, index=True)


class Study(Base):
    __tablename__ = "studies"

    id: Mapped[int] = mapped_column(primary_key=True)
    title: Mapped[str] = mapped_column(String(200))
    purpose: Mapped[str] = mapped_column(Text, default="")
    process: Mapped[str] = mapped_column(Text, default="")
    owner_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    review_below: Mapped[float] = mapped_column(Float, default=0.05)
    fail_below: Mapped[float] = mapped_column(Float, default=0.01)

    owner: Mapped[User] = relationship()
    data_versions: Mapped[list[DataVersion]] = relationship(
        back_populates="study", order_by="DataVersion.version"
    )


STUDY_MEMBER_ROLES = ("engineer",)


class StudyMember(Base):
    """An engineer on a study's team besides its owner (the owner is always a member).

    Added and removed by the owner or an admin (app.workflow.teams), each change audited.
    ``role`` is "engineer" for now; the column is kept for roles a team may gain later."""

    __tablename__ = "study_members"
    __table_args__ = (UniqueConstraint("study_id", "user_id"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    role: Mapped[str] = mapped_column(String(16), default="engineer",
                                      server_default="engineer")
    added_by_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"))
    added_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    study: Mapped[Study] = relationship()
    user: Mapped[User] = relationship(foreign_keys=[user_id])
    added_by: Mapped[User | None] = relationship(foreign_keys=[added_by_id])


class DataVersion(Base):
    """An immutable upload: original bytes and the canonical table, each with its SHA-256."""

    __tablename__ = "data_versions"
    __table_args__ = (UniqueConstraint("study_id", "version"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    version: Mapped[int] = mapped_column(Integer)
    filename: Mapped[str] = mapped_column(String(255))
    file_kind: Mapped[str] = mapped_column(String(8))
    sheet: Mapped[str | None] = mapped_column(String(255))
    # Large columns load on first access, so listings do not read every file and document.
    original_bytes: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    original_sha256: Mapped[str] = mapped_column(String(64))
    canonical_csv: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    canonical_sha256: Mapped[str] = mapped_column(String(64))
    roles_json: Mapped[str] = mapped_column(Text)
    read_info_json: Mapped[str] = mapped_column(Text, default="{}")
    n_rows: Mapped[int] = mapped_column(Integer)
    reason: Mapped[str | None] = mapped_column(Text)
    created_by_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    study: Mapped[Study] = relationship(back_populates="data_versions")
    created_by: Mapped[User] = relationship()


class Plan(Base):
    """A planned experiment: the request, the built design with its randomised run order (and
    the seed that made it), its evaluation, and their SHA-256, sealed like a fit snapshot.
    Never changed: triggers (migration 0009) refuse UPDATE and DELETE."""

    __tablename__ = "plans"

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    design: Mapped[str] = mapped_column(String(32))
    request_json: Mapped[str] = mapped_column(Text)
    plan_json: Mapped[str] = mapped_column(Text)
    evaluation_json: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64))
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))
    created_by_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    study: Mapped[Study] = relationship()
    created_by: Mapped[User] = relationship()


class PlanUpload(Base):
    """A data version uploaded against a plan, with the tolerance its settings were compared
    with (natural units per factor). Never changed (migration 0009)."""

    __tablename__ = "plan_uploads"

    data_version_id: Mapped[int] = mapped_column(ForeignKey("data_versions.id"),
                                                 primary_key=True)
    plan_id: Mapped[int] = mapped_column(ForeignKey("plans.id"), index=True)
    tolerance_json: Mapped[str] = mapped_column(Text)

    plan: Mapped[Plan] = relationship()


FIT_STATES = ("draft", "submitted", "approved", "returned", "superseded", "withdrawn")


class Fit(Base):
    """A fit snapshot: inputs, results, thresholds and software version, hashed once at creation.

    Only ``state``, ``row_version`` and the submission fields change later, and only by
    conditional updates on (state, row_version); database triggers (migration 0005) refuse
    changes to the snapshot columns and deletion.
    """

    __tablename__ = "fits"

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    data_version_id: Mapped[int] = mapped_column(ForeignKey("data_versions.id"), index=True)
    response: Mapped[str] = mapped_column(String(200))
    spec_json: Mapped[str] = mapped_column(Text, deferred=True)
    results_json: Mapped[str] = mapped_column(Text, deferred=True)
    thresholds_json: Mapped[str] = mapped_column(Text)
    software_version: Mapped[str] = mapped_column(String(64))
    snapshot_sha256: Mapped[str] = mapped_column(String(64))
    state: Mapped[str] = mapped_column(String(16), default="draft")
    row_version: Mapped[int] = mapped_column(Integer, default=1)
    created_by_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    submitted_by_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"))
    submitted_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    # HMAC-SHA-256 of ``snapshot_sha256`` under the integrity key ``key_id``
    # (app.store.keys); None only for rows written before migration 0007.
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))

    study: Mapped[Study] = relationship()
    data_version: Mapped[DataVersion] = relationship()
    created_by: Mapped[User] = relationship(foreign_keys=[created_by_id])
    submitted_by: Mapped[User | None] = relationship(foreign_keys=[submitted_by_id])
    signatures: Mapped[list[Signature]] = relationship(
        back_populates="fit", order_by="Signature.id"
    )


class FitRuns(Base):
    """A fit's per-run table in the column-wise block format of ``app.analysis.runstore``.

    The fit's results document names the block's SHA-256, so the snapshot hash covers it;
    database triggers (migration 0008) refuse UPDATE and DELETE.
    """

    __tablename__ = "fit_runs"

    fit_id: Mapped[int] = mapped_column(ForeignKey("fits.id"), primary_key=True)
    sha256: Mapped[str] = mapped_column(String(64))
    data: Mapped[bytes] = mapped_column(LargeBinary)


class Signature(Base):
    """An electronic signature: who, printed name, server UTC time, meaning, what was signed."""

    __tablename__ = "signatures"

    id: Mapped[int] = mapped_column(primary_key=True)
    fit_id: Mapped[int | None] = mapped_column(ForeignKey("fits.id"), index=True)
    setpoint_id: Mapped[int | None] = mapped_column(Integer, index=True)
    signer_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    printed_name: Mapped[str] = mapped_column(String(200))
    signed_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    meaning: Mapped[str] = mapped_column(String(100))
    comment: Mapped[str] = mapped_column(Text, default="")
    snapshot_sha256: Mapped[str] = mapped_column(String(64))
    # SHA-256 over (signer, name, time, meaning, comment, snapshot hash): binds the manifest.
    manifest_sha256: Mapped[str] = mapped_column(String(64))
    # HMAC-SHA-256 of ``manifest_sha256`` under the integrity key ``key_id``
    # (app.store.keys); None only for rows written before migration 0007.
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))

    fit: Mapped[Fit | None] = relationship(back_populates="signatures")
    signer: Mapped[User] = relationship()


class AuditEvent(Base):
    """One link of the hash chain. Triggers refuse UPDATE and DELETE on this table."""

    __tablename__ = "audit_events"

    id: Mapped[int] = mapped_column(primary_key=True)
    seq: Mapped[int] = mapped_column(Integer, unique=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    actor_id: Mapped[int | None] = mapped_column(Integer)
    actor_name: Mapped[str] = mapped_column(String(200))
    action: Mapped[str] = mapped_column(String(64), index=True)
    object_type: Mapped[str] = mapped_column(String(32))
    object_id: Mapped[str | None] = mapped_column(String(64))
    study_id: Mapped[int | None] = mapped_column(Integer, index=True)
    old_json: Mapped[str | None] = mapped_column(Text)
    new_json: Mapped[str | None] = mapped_column(Text)
    reason: Mapped[str | None] = mapped_column(Text)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64), unique=True)
    # HMAC-SHA-256 of ``hash`` under the integrity key ``key_id`` (app.store.keys); None only
    # for events written before migration 0007, which then form the start of the chain.
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))


class ChainHead(Base):
    """A single row locked by every audit append, so appends are serialized on any database."""

    __tablename__ = "chain_head"

    id: Mapped[int] = mapped_column(primary_key=True)
    seq: Mapped[int] = mapped_column(Integer, default=0)
    hash: Mapped[str] = mapped_column(String(64))


SETPOINT_STATES = ("draft", "released", "failed", "confirmed", "returned", "withdrawn")


class SetpointProposal(Base):
    """Settings proposed from approved fits: inputs, the search result, and their SHA-256.

    Only ``state`` and ``row_version`` change later, by conditional updates on both. The hash
    covers the inputs, the result and the snapshot hashes of the fits it came from.
    """

    __tablename__ = "setpoint_proposals"

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"), index=True)
    fit_ids_json: Mapped[str] = mapped_column(Text)
    goals_json: Mapped[str] = mapped_column(Text)
    bounds_json: Mapped[str] = mapped_column(Text)
    fixed_json: Mapped[str] = mapped_column(Text)
    result_json: Mapped[str] = mapped_column(Text)
    snapshot_sha256: Mapped[str] = mapped_column(String(64))
    state: Mapped[str] = mapped_column(String(16), default="draft")
    row_version: Mapped[int] = mapped_column(Integer, default=1)
    created_by_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # HMAC-SHA-256 of ``snapshot_sha256`` under the integrity key ``key_id``
    # (app.store.keys); None only for rows written before migration 0007.
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))

    study: Mapped[Study] = relationship()
    created_by: Mapped[User] = relationship()
    confirmations: Mapped[list[ConfirmationRun]] = relationship(
        back_populates="setpoint", order_by="ConfirmationRun.id"
    )


class ConfirmationRun(Base):
    """An uploaded file of runs made at released setpoints, with the verdict per response."""

    __tablename__ = "confirmation_runs"

    id: Mapped[int] = mapped_column(primary_key=True)
    setpoint_id: Mapped[int] = mapped_column(ForeignKey("setpoint_proposals.id"), index=True)
    filename: Mapped[str] = mapped_column(String(255))
    # Large columns load on first access, so listings do not read every file and document.
    original_bytes: Mapped[bytes] = mapped_column(LargeBinary, deferred=True)
    original_sha256: Mapped[str] = mapped_column(String(64))
    results_json: Mapped[str] = mapped_column(Text)
    created_by_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # HMAC-SHA-256 of the run's record digest (app.workflow.confirmations.record_sha256)
    # under the integrity key ``key_id`` (app.store.keys); None only for rows written before
    # migration 0007.
    key_id: Mapped[str | None] = mapped_column(String(16))
    seal: Mapped[str | None] = mapped_column(String(64))

    setpoint: Mapped[SetpointProposal] = relationship(back_populates="confirmations")
    created_by: Mapped[User] = relationship()
