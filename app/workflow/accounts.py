"""Users, logins, server-side sessions and API tokens."""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
import time
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import bindparam, delete, func, select, update
from sqlalchemy.orm import Session

from app.store import audit
from app.store.base import utcnow
from app.store.models import ROLES, ApiToken, LoginFailure, User, UserSession
from app.workflow import Conflict, NotFound, WorkflowError, in_id_range, signing
from app.workflow.passwords import dummy_hash, hash_password, password_problem, verify_password

USERNAME_RE = re.compile(r"^[a-z0-9][a-z0-9._-]{1,63}$")


def sha256_hex(value: str) -> str:
    return hashlib.sha256(value.encode()).hexdigest()


def parse_roles(roles: str | list[str] | tuple[str, ...]) -> list[str]:
    items = roles.split(",") if isinstance(roles, str) else list(roles)
    cleaned = sorted({r.strip().lower() for r in items if r.strip()})
    unknown = [r for r in cleaned if r not in ROLES]
    if unknown:
        raise WorkflowError(f"Unknown role {', '.join(unknown)}; roles are {', '.join(ROLES)}.",
                            field="roles")
    if not cleaned:
        raise WorkflowError("A user needs at least one role.", field="roles")
    return cleaned


def get_user(session: Session, username: str) -> User:
    user = session.scalar(select(User).where(User.username == username))
    if user is None:
        raise NotFound(f"No user named '{username}'.", field="username")
    return user


def create_user(session: Session, actor: User | None, *, username: str, full_name: str,
                roles: str | list[str], password: str, one_time: bool = False) -> User:
    username = username.strip().lower()
    if not USERNAME_RE.match(username):
        raise WorkflowError("User name must be 2–64 characters: lower-case letters, digits, "
                            "'.', '_' or '-', starting with a letter or digit.", field="username")
    if not full_name.strip():
        raise WorkflowError("Full name is required: it is printed with every signature.",
                            field="full_name")
    role_list = parse_roles(roles)
    signing.check_role_combination(role_list)
    problem = password_problem(password, username=username)
    if problem:
        raise WorkflowError(problem, field="password")
    if session.scalar(select(User.id).where(User.username == username)) is not None:
        raise Conflict(f"User name '{username}' is taken.", field="username")
    signing.check_printed_name(session, full_name)
    user = User(username=username, full_name=full_name.strip(), roles=",".join(role_list),
                password_hash=hash_password(password), must_change_password=one_time)
    session.add(user)
    session.flush()
    audit.record(session, actor=actor, action="user.create", object_type="user",
                 object_id=user.id, new={"username": username, "full_name": user.full_name,
                                         "roles": role_list, "active": True,
                                         "one_time_password": one_time})
    return user


def set_roles(session: Session, actor: User | None, username: str, roles: str | list[str]) -> User:
    user = get_user(session, username)
    old = sorted(user.role_set)
    new = parse_roles(roles)
    signing.check_role_change(actor, user, new)
    user.roles = ",".join(new)
    audit.record(session, actor=actor, action="user.set_roles", object_type="user",
                 object_id=user.id, old={"roles": old}, new={"roles": new})
    return user


def set_active(session: Session, actor: User | None, username: str, active: bool) -> User:
    user = get_user(session, username)
    if actor is not None and actor.id == user.id and not active:
        raise WorkflowError("You cannot deactivate your own account.", field="username")
    if active and not user.active:
        signing.check_printed_name(session, user.full_name, user_id=user.id)
    old = user.active
    user.active = active
    if not active:
        revoke_sessions(session, user.id)
        session.execute(update(ApiToken).where(ApiToken.user_id == user.id,
                                               ApiToken.revoked_at.is_(None))
                        .values(revoked_at=utcnow()))
    audit.record(session, actor=actor, action="user.activate" if active else "user.deactivate",
                 object_type="user", object_id=user.id, old={"active": old},
                 new={"active": active})
    return user


def new_password_hash(password: str, *, username: str) -> str:
    """The argon2id hash of an acceptable new password. Slow on purpose: call it before the
    write transaction opens (SQLite has one writer)."""
    problem = password_problem(password, username=username)
    if problem:
        raise WorkflowError(problem, field="password")
    return hash_password(password)


def set_password(session: Session, actor: User | None, username: str, password: str) -> User:
    user = get_user(session, username)
    return _store_password(session, actor, user, new_password_hash(password,
                                                                   username=user.username))


def _store_password(session: Session, actor: User | None, user: User,
                    password_hash: str) -> User:
    user.password_hash = password_hash
    user.password_changed_at = utcnow()
    # Someone else setting the password makes it one-time; the user setting it clears that.
    user.must_change_password = actor is None or actor.id != user.id
    revoke_sessions(session, user.id)
    audit.record(session, actor=actor, action="user.set_password", object_type="user",
                 object_id=user.id, new={"password": "changed"})
    revoke_user_tokens(session, actor, user, why="password changed")
    return user


def set_full_name(session: Session, actor: User | None, username: str, full_name: str) -> User:
    """Change the printed name; it stays unique among active users."""
    user = get_user(session, username)
    full_name = full_name.strip()
    if not full_name:
        raise WorkflowError("Full name is required: it is printed with every signature.",
                            field="full_name")
    if user.active:
        signing.check_printed_name(session, full_name, user_id=user.id)
    old, user.full_name = user.full_name, full_name
    audit.record(session, actor=actor, action="user.set_full_name", object_type="user",
                 object_id=user.id, old={"full_name": old}, new={"full_name": full_name})
    return user


def change_own_password(session: Session, actor: User, proof: signing.Reauthenticated | None,
                        password_hash: str) -> User:
    """The signed-in user replaces their password with one hashed by
    :func:`new_password_hash` before this transaction. ``proof`` is the current password, also
    checked before it (:func:`app.workflow.signing.signed`); success clears the count of wrong
    passwords."""
    signing.accept(session, actor, proof)
    return _store_password(session, actor, actor, password_hash)


def unlock(session: Session, actor: User | None, username: str) -> User:
    """End a signing and password-change lock, and the count of wrong passwords, at once."""
    user = get_user(session, username)
    old = {"consecutive_failures": user.reauth_failures,
           "locked_until": None if user.reauth_locked_until is None
           else user.reauth_locked_until.strftime("%Y-%m-%dT%H:%M:%SZ")}
    user.reauth_failures = 0
    user.reauth_locked_until = None
    audit.record(session, actor=actor, action="user.unlock", object_type="user",
                 object_id=user.id, old=old, new={"consecutive_failures": 0,
                                                  "locked_until": None})
    return user


def record_refused_change(session: Session, actor: User | None, username: str, doing: str,
                          exc: WorkflowError) -> None:
    """Audit a refused account change (own roles, admin with approver, a printed name taken),
    in a transaction of its own after the refused one rolled back."""
    user = session.scalar(select(User).where(User.username == username))
    audit.record(session, actor=actor, action="user.change_refused", object_type="user",
                 object_id=None if user is None else user.id,
                 new={"username": username[:64], "attempted": doing,
                      "cause": signing.cause_of(exc), "why": exc.message})


def revoke_sessions(session: Session, user_id: int) -> None:
    session.execute(update(UserSession).where(UserSession.user_id == user_id,
                                              UserSession.revoked_at.is_(None))
                    .values(revoked_at=utcnow()))


# ---- login throttling -------------------------------------------------------------------

UNKNOWN_USER = "(unknown)"


@dataclass(frozen=True)
class Throttle:
    """Failed sign-ins within the window before each further attempt must wait.

    Counted per account and address (``free_attempts``) and per account from any address
    (``account_free_attempts``, larger), never per address alone: one person behind a shared
    NAT or proxy must not lock everyone else there out. Past the free failures each attempt
    waits 2, 4, 8 … seconds (at most ``max_delay_seconds``) after the last failure. The failure
    that starts the wait was itself checked, so a burst has ``free_attempts + 1`` passwords
    checked at most.
    """

    window: timedelta = timedelta(minutes=15)
    free_attempts: int = 5
    account_free_attempts: int = 20
    max_delay_seconds: int = 300


# An attempt let through to the password check is counted at once, dated this far ahead until
# its check settles it (then it is dated when it failed, or cleared by a success): a row dated
# in the future is an attempt still in flight. A crashed check stays in flight this long.
IN_FLIGHT = timedelta(seconds=30)
# While attempts on the account are in flight, a refused attempt waits for them to settle
# (a concurrent success clears the count) before it is refused: at most this long.
IN_FLIGHT_WAIT_SECONDS = 5.0


def _wait(excess: int, last: datetime | None, now: datetime, rules: Throttle) -> int:
    if excess <= 0 or last is None:
        return 0
    last = last if last.tzinfo else last.replace(tzinfo=now.tzinfo)
    last = min(last, now)  # an attempt in flight counts from now
    delay = min(rules.max_delay_seconds, 2 ** min(excess, 12))
    return max(0, int(delay - (now - last).total_seconds() + 0.999))


def throttle_delay(session: Session, account: str, remote_addr: str | None,
                   now: datetime, rules: Throttle = Throttle()) -> int:
    """Seconds the next attempt on ``account`` (as :class:`LoginName` records it) from
    ``remote_addr`` must wait: doubles with each failure past the free ones."""
    recent = select(func.count(), func.max(LoginFailure.at)).where(
        LoginFailure.username == account, LoginFailure.at >= now - rules.window)
    by_account, last_account = session.execute(recent).one()
    same_addr = (LoginFailure.remote_addr.is_(None) if remote_addr is None
                 else LoginFailure.remote_addr == remote_addr)
    by_pair, last_pair = session.execute(recent.where(same_addr)).one()
    return max(_wait(by_pair - rules.free_attempts, last_pair, now, rules),
               _wait(by_account - rules.account_free_attempts, last_account, now, rules))


class LoginRefused(WorkflowError):
    status = 401


class LoginThrottled(WorkflowError):
    status = 429


@dataclass(frozen=True)
class LoginName:
    """The user name a sign-in gave, as the records keep it.

    A name that matches an account is kept as it is. Any other is kept only as a keyed hash
    (HMAC-SHA-256): people type passwords into the name field by mistake, and the audit trail
    can never be edited. ``failure_key`` is what ``login_failures.username`` holds: the user
    name, or ``?`` and 63 hex digits of the hash (``?`` is never part of a user name).
    """

    user_id: int | None
    failure_key: str
    audit: dict[str, str]

    @classmethod
    def of(cls, typed: str, user: User | None, key: bytes) -> LoginName:
        if user is not None:
            return cls(user.id, user.username, {"username": user.username})
        digest = hmac.new(key, typed.encode(), hashlib.sha256).hexdigest()
        return cls(None, "?" + digest[:63], {"username": UNKNOWN_USER, "username_hmac": digest})


@dataclass(frozen=True)
class LoginAttempt:
    """A sign-in let through to the password check, already counted as a failure
    (``failure_id``), or refused as throttled (``wait_seconds`` > 0)."""

    name: LoginName
    remote_addr: str | None
    failure_id: int | None = None
    password_hash: str | None = None
    active: bool = False
    wait_seconds: int = 0
    in_flight: int = 0   # other attempts on the account whose check has not settled yet


def _serialize_attempts(session: Session, failure_key: str) -> None:
    """Let one transaction at a time count attempts on this account. SQLite write transactions
    (BEGIN IMMEDIATE) already run one at a time; PostgreSQL takes a transaction-scoped advisory
    lock on the account."""
    if session.get_bind().dialect.name == "postgresql":
        lock_id = int.from_bytes(hashlib.sha256(b"login:" + failure_key.encode()).digest()[:8],
                                 "big", signed=True)
        session.execute(select(func.pg_advisory_xact_lock(lock_id)))


def begin_login(session: Session, username: str, remote_addr: str | None, *, name_key: bytes,
                rules: Throttle = Throttle(), now: datetime | None = None,
                audit_throttle: bool = True) -> LoginAttempt:
    """Decide in one write transaction whether this attempt may have its password checked, and
    count it as a failure in the same transaction before the check runs (the check, outside any
    transaction, then clears it or keeps it). Deciding and counting together keeps any number
    of concurrent attempts within the allowance. A throttled attempt is audited here
    (``auth.login_throttled``)."""
    now = now or utcnow()
    typed = (username or "").strip().lower()
    user = session.scalar(select(User).where(User.username == typed)) if typed else None
    name = LoginName.of(typed, user, name_key)
    _serialize_attempts(session, name.failure_key)
    wait = throttle_delay(session, name.failure_key, remote_addr, now, rules)
    if wait > 0:
        in_flight = session.scalar(select(func.count()).where(
            LoginFailure.username == name.failure_key, LoginFailure.at > now)) or 0
        attempt = LoginAttempt(name, remote_addr, wait_seconds=wait, in_flight=in_flight)
        if audit_throttle:
            audit_throttled(session, attempt)
        return attempt
    failure = LoginFailure(username=name.failure_key, remote_addr=remote_addr,
                           at=now + IN_FLIGHT)
    session.add(failure)
    session.flush()
    return LoginAttempt(name, remote_addr, failure_id=failure.id,
                        password_hash=None if user is None else user.password_hash,
                        active=user is not None and user.active)


def audit_throttled(session: Session, attempt: LoginAttempt) -> None:
    """Audit a sign-in refused as throttled (``auth.login_throttled``)."""
    audit.record(session, actor=None, action="auth.login_throttled", object_type="user",
                 object_id=attempt.name.user_id,
                 new={**attempt.name.audit, "remote_addr": attempt.remote_addr,
                      "wait_seconds": attempt.wait_seconds})


def record_failed_login(session: Session, attempt: LoginAttempt, why: str) -> None:
    """Audit a failed sign-in; its failure was counted by :func:`begin_login` and now dates
    from the failure."""
    if attempt.failure_id is not None:
        session.execute(update(LoginFailure).where(LoginFailure.id == attempt.failure_id)
                        .values(at=utcnow()))
    audit.record(session, actor=None, action="auth.login_failed", object_type="user",
                 object_id=attempt.name.user_id,
                 new={**attempt.name.audit, "remote_addr": attempt.remote_addr, "why": why})


def sign_in(write: signing.Sessions, username: str, password: str, remote_addr: str | None, *,
            name_key: bytes, rules: Throttle = Throttle()) -> tuple[int, str]:
    """The whole sign-in: :func:`begin_login` in one ``write()`` transaction, the deliberately
    slow argon2 check outside any transaction (SQLite has one writer), then
    :func:`start_session` or :func:`record_failed_login` in another. Returns the user id and
    the raw session token; raises :class:`LoginThrottled` or :class:`LoginRefused`."""
    deadline = time.monotonic() + IN_FLIGHT_WAIT_SECONDS
    while True:
        with write() as session:
            attempt = begin_login(session, username, remote_addr, name_key=name_key,
                                  rules=rules, audit_throttle=False)
        # Refused only because other checks on this account are still running: wait for them
        # (several correct sign-ins at once clear each other's count), then decide again.
        if not (attempt.wait_seconds and attempt.in_flight) or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    if attempt.wait_seconds:
        with write() as session:
            audit_throttled(session, attempt)
        raise LoginThrottled(f"Too many failed sign-ins. Try again in {attempt.wait_seconds} "
                             "seconds.")
    if attempt.password_hash is None:
        verify_password(dummy_hash(), password or "")  # the same time as for a real account
    elif verify_password(attempt.password_hash, password or "") and attempt.active:
        with write() as session:
            user = session.get(User, attempt.name.user_id)
            # Still the password just checked, and still active.
            if user is not None and user.active and user.password_hash == attempt.password_hash:
                return user.id, start_session(session, user, remote_addr)
    with write() as session:
        record_failed_login(session, attempt, "wrong user name or password")
    raise LoginRefused("User name or password is wrong.")


def start_session(session: Session, user: User, remote_addr: str | None) -> str:
    """Create a server-side session; returns the raw token for the cookie."""
    token = secrets.token_urlsafe(32)
    session.execute(delete(LoginFailure).where(LoginFailure.username == user.username))
    session.add(UserSession(token_sha256=sha256_hex(token), user_id=user.id,
                            remote_addr=remote_addr))
    audit.record(session, actor=user, action="auth.login", object_type="user",
                 object_id=user.id, new={"remote_addr": remote_addr})
    return token


def end_session(session: Session, token: str, user: User | None) -> None:
    row = session.scalar(select(UserSession).where(UserSession.token_sha256 == sha256_hex(token)))
    if row is not None and row.revoked_at is None:
        row.revoked_at = utcnow()
        audit.record(session, actor=user, action="auth.logout", object_type="user",
                     object_id=row.user_id)


# Built once: every signed-in request runs it, and building the statement costs as much as
# running it. The session row comes back as plain columns (no object to track).
_SESSIONS = UserSession.__table__
_SESSION_LOOKUP = (select(User, _SESSIONS.c.id, _SESSIONS.c.revoked_at, _SESSIONS.c.last_seen_at,
                          _SESSIONS.c.created_at)
                   .join(_SESSIONS, _SESSIONS.c.user_id == User.id)
                   .where(_SESSIONS.c.token_sha256 == bindparam("token_sha256")))


def session_user(session: Session, token: str, *, idle: timedelta, max_age: timedelta,
                 now: datetime) -> tuple[User, Any] | None:
    """The active user behind a session token, or None when revoked, idle or too old.
    Returns the user and the session row (``id``, ``revoked_at``, ``last_seen_at``,
    ``created_at``)."""
    found = session.execute(_SESSION_LOOKUP, {"token_sha256": sha256_hex(token)}).first()
    if found is None:
        return None
    user, row = found[0], found
    if row.revoked_at is not None or not user.active:
        return None
    if now - row.last_seen_at > idle or now - row.created_at > max_age:
        return None
    return user, row


# ---- API tokens ---------------------------------------------------------------------------

TOKEN_PREFIX = "plb_"  # noqa: S105  (a public prefix, not a secret)
READ, READ_WRITE = "read", "read-write"
TOKEN_SCOPES = (READ, READ_WRITE)
# Methods a read token may use; anything else needs a read-write token.
READ_METHODS = frozenset({"GET", "HEAD"})
TOKEN_DAYS = 90        # API_TOKEN_DAYS
TOKEN_MAX_DAYS = 365   # API_TOKEN_MAX_DAYS
# last_used_at is written at most this often per token, so that reads stay reads.
TOKEN_TOUCH_SECONDS = 60


def token_days(value: Any, max_days: int = TOKEN_MAX_DAYS) -> int:
    """A token's lifetime in whole days, 1 to ``max_days``."""
    try:
        days = int(str(value).strip())
    except (TypeError, ValueError):
        days = 0
    if not 1 <= days <= max_days:
        raise WorkflowError(f"A token lives 1 to {max_days} days.", field="days")
    return days


def create_token(session: Session, actor: User | None, user: User, name: str, *,
                 scope: str = READ_WRITE, days: int | str = TOKEN_DAYS,
                 max_days: int = TOKEN_MAX_DAYS,
                 proof: signing.Reauthenticated | None = None,
                 now: datetime | None = None) -> tuple[ApiToken, str]:
    """Mint a token; returns the row and the raw token (shown once, only its hash is kept).

    ``actor`` None is the command line, run by an administrator on the server. A signed-in
    actor must have entered the password again just before (``proof`` from
    :func:`app.workflow.signing.signed`, checked outside this transaction).
    """
    if actor is not None:
        signing.accept(session, actor, proof)
    name = (name or "").strip()
    if not name:
        raise WorkflowError("A token needs a name saying what it is for.", field="name")
    if scope not in TOKEN_SCOPES:
        raise WorkflowError(f"A token's scope is {READ} or {READ_WRITE}.", field="scope")
    days = token_days(days, max_days)
    now = now or utcnow()
    raw = TOKEN_PREFIX + secrets.token_urlsafe(32)
    token = ApiToken(user_id=user.id, name=name[:100], token_sha256=sha256_hex(raw),
                     prefix=raw[:10], scope=scope, created_at=now,
                     expires_at=now + timedelta(days=days))
    session.add(token)
    session.flush()
    audit.record(session, actor=actor if actor is not None else None, action="token.create",
                 object_type="api_token", object_id=token.id,
                 new={"user": user.username, "name": token.name, "prefix": token.prefix,
                      "scope": scope,
                      "expires_at": token.expires_at.strftime("%Y-%m-%dT%H:%M:%SZ")})
    return token, raw


def revoke_user_tokens(session: Session, actor: User | None, user: User, *, why: str) -> int:
    """Revoke every active token of ``user`` in the caller's transaction; audited when any."""
    tokens = list(session.scalars(select(ApiToken).where(ApiToken.user_id == user.id,
                                                         ApiToken.revoked_at.is_(None))))
    now = utcnow()
    for token in tokens:
        token.revoked_at = now
    if tokens:
        audit.record(session, actor=actor, action="token.revoke_all", object_type="user",
                     object_id=user.id, new={"prefixes": [t.prefix for t in tokens],
                                             "why": why})
    return len(tokens)


def revoke_token(session: Session, actor: User, token_id: int) -> ApiToken:
    token = session.get(ApiToken, token_id) if in_id_range(token_id) else None
    if token is None or (token.user_id != actor.id and not actor.has_role("admin")):
        raise NotFound("No such token.", field="token")
    if token.revoked_at is None:
        token.revoked_at = utcnow()
        audit.record(session, actor=actor, action="token.revoke", object_type="api_token",
                     object_id=token.id, new={"prefix": token.prefix})
    return token


@dataclass(frozen=True)
class TokenUse:
    """Who a valid token acts for, with what scope; ``last_used_at`` as stored before."""

    user: User
    token_id: int
    scope: str
    last_used_at: datetime | None


def token_use(session: Session, raw: str, *, now: datetime | None = None) -> TokenUse | None:
    """The valid token behind ``raw``, or None when unknown, revoked, expired, or its user is
    deactivated. Only reads."""
    token = session.scalar(select(ApiToken).where(ApiToken.token_sha256 == sha256_hex(raw)))
    if token is None or token.revoked_at is not None or token.expires_at <= (now or utcnow()):
        return None
    user = session.get(User, token.user_id)
    if user is None or not user.active:
        return None
    return TokenUse(user=user, token_id=token.id, scope=token.scope,
                    last_used_at=token.last_used_at)


def token_user(session: Session, raw: str) -> User | None:
    found = token_use(session, raw)
    return None if found is None else found.user


def token_touch_due(use: TokenUse, now: datetime) -> bool:
    """Whether ``last_used_at`` is unset or older than TOKEN_TOUCH_SECONDS."""
    return (use.last_used_at is None
            or (now - use.last_used_at).total_seconds() > TOKEN_TOUCH_SECONDS)


def touch_token(session: Session, use: TokenUse, now: datetime) -> None:
    """Write ``last_used_at`` (not audited: it records use, it changes nothing)."""
    session.execute(update(ApiToken).where(ApiToken.id == use.token_id)
                    .values(last_used_at=now))
