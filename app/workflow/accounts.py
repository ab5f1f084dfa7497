"""Users, logins, server-side sessions and API tokens."""

from __future__ import annotations

import hashlib
import re
import secrets
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

@dataclass(frozen=True)
class Throttle:
    """Failures within the window before each further attempt must wait.

    Counted per account and per address.
    """

    window: timedelta = timedelta(minutes=15)
    free_attempts: int = 5
    max_delay_seconds: int = 300


def throttle_delay(session: Session, username: str, remote_addr: str | None,
                   now: datetime, rules: Throttle = Throttle()) -> int:
    """Seconds the next attempt must wait: doubles with each failure past the free ones."""
    since = now - rules.window
    by_user = session.scalar(select(func.count()).select_from(LoginFailure).where(
        LoginFailure.username == username, LoginFailure.at >= since)) or 0
    by_addr = 0
    if remote_addr:
        by_addr = session.scalar(select(func.count()).select_from(LoginFailure).where(
            LoginFailure.remote_addr == remote_addr, LoginFailure.at >= since)) or 0
    # An address may try several accounts; give it a larger allowance than one account.
    excess = max(by_user - rules.free_attempts, by_addr - 4 * rules.free_attempts)
    if excess <= 0:
        return 0
    last = session.scalar(select(func.max(LoginFailure.at)).where(
        (LoginFailure.username == username) | (LoginFailure.remote_addr == remote_addr)))
    delay = min(rules.max_delay_seconds, 2 ** min(excess, 12))
    if last is None:
        return 0
    last = last if last.tzinfo else last.replace(tzinfo=now.tzinfo)
    remaining = delay - (now - last).total_seconds()
    return max(0, int(remaining + 0.999))


class LoginRefused(WorkflowError):
    status = 401


class LoginThrottled(WorkflowError):
    status = 429


def authenticate(session: Session, username: str, password: str,
                 remote_addr: str | None) -> User:
    """Check a password; only reads. Raises LoginRefused/LoginThrottled.

    Run it in a read session: the deliberately slow argon2 verify must not hold a write lock.
    Then :func:`start_session` (success) or :func:`record_failed_login` (failure) writes, each
    in its own short transaction.
    """
    username = (username or "").strip().lower()
    now = utcnow()
    wait = throttle_delay(session, username, remote_addr, now)
    if wait > 0:
        raise LoginThrottled(f"Too many failed sign-ins. Try again in {wait} seconds.")
    user = session.scalar(select(User).where(User.username == username))
    if user is None:
        verify_password(dummy_hash(), password)
        raise LoginRefused("User name or password is wrong.")
    if not verify_password(user.password_hash, password) or not user.active:
        raise LoginRefused("User name or password is wrong.")
    return user


def record_failed_login(session: Session, username: str, remote_addr: str | None,
                        why: str) -> None:
    username = (username or "").strip().lower()[:64]
    session.add(LoginFailure(username=username, remote_addr=remote_addr))
    user = session.scalar(select(User).where(User.username == username))
    audit.record(session, actor=None, action="auth.login_failed", object_type="user",
                 object_id=None if user is None else user.id,
                 new={"username": username, "remote_addr": remote_addr, "why": why})


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


def create_token(
    session: Session, actor: User | None, user: User, name: str
) -> tuple[ApiToken, str]:
    name = (name or "").strip()
    if not name:
        raise WorkflowError("A token needs a name saying what it is for.", field="name")
    raw = TOKEN_PREFIX + secrets.token_urlsafe(32)
    token = ApiToken(user_id=user.id, name=name[:100], token_sha256=sha256_hex(raw),
                     prefix=raw[:10])
    session.add(token)
    session.flush()
    audit.record(session, actor=actor if actor is not None else None, action="token.create",
                 object_type="api_token", object_id=token.id,
                 new={"user": user.username, "name": token.name, "prefix": token.prefix})
    return token, raw


def revoke_token(session: Session, actor: User, token_id: int) -> ApiToken:
    token = session.get(ApiToken, token_id) if in_id_range(token_id) else None
    if token is None or (token.user_id != actor.id and not actor.has_role("admin")):
        raise NotFound("No such token.", field="token")
    if token.revoked_at is None:
        token.revoked_at = utcnow()
        audit.record(session, actor=actor, action="token.revoke", object_type="api_token",
                     object_id=token.id, new={"prefix": token.prefix})
    return token


def token_user(session: Session, raw: str) -> User | None:
    token = session.scalar(select(ApiToken).where(ApiToken.token_sha256 == sha256_hex(raw)))
    if token is None or token.revoked_at is not None:
        return None
    user = session.get(User, token.user_id)
    return user if user is not None and user.active else None
