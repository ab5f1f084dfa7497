"""Deny by default: every view declares who may use it; the check runs before every request."""

from __future__ import annotations

import secrets
from collections.abc import Callable
from datetime import timedelta
from typing import TypeVar

from flask import abort, current_app, flash, g, jsonify, redirect, request, session, url_for
from sqlalchemy import update

from app.store.base import utcnow
from app.store.db import WRITE_METHODS, database, get_session
from app.store.models import User, UserSession
from app.web import freshness
from app.workflow import NotFound, accounts, teams

F = TypeVar("F", bound=Callable)
PUBLIC = "public"
SIGNED_IN = "signed-in"
ROLES_ATTR = "_plumbline_roles"
PASSWORD_CHANGE_ENDPOINTS = frozenset({"account.page", "account.change_password", "auth.logout"})


def allow(*roles: str) -> Callable[[F], F]:
    """Declare the roles (or PUBLIC / SIGNED_IN) that may call a view."""
    if not roles:
        raise ValueError("allow() needs at least one role")

    def mark(view: F) -> F:
        setattr(view, ROLES_ATTR, frozenset(roles))
        return view

    return mark


READS_ONLY_ATTR = "_plumbline_reads_only"


def reads_only(view: F) -> F:
    """Mark a POST view that changes nothing (a question with a body, e.g. predictions): a
    read-scope API token may call it, and its team check is a read's (a refusal is a 404, not
    an audited refused write). The CSRF check for browser sessions still applies."""
    setattr(view, READS_ONLY_ATTR, True)
    return view


def _writes() -> bool:
    """Does this request ask to change something?"""
    if request.method not in WRITE_METHODS:
        return False
    view = current_app.view_functions.get(request.endpoint or "")
    return not getattr(view, READS_ONLY_ATTR, False)


def allowed_roles(endpoint: str | None) -> frozenset[str] | None:
    if endpoint is None:
        return None
    if endpoint == "static":
        return frozenset({PUBLIC})
    view = current_app.view_functions.get(endpoint)
    return getattr(view, ROLES_ATTR, None)


def csrf_token() -> str:
    token = session.get("csrf")
    if not token:
        token = session["csrf"] = secrets.token_urlsafe(32)
    return token


def is_api() -> bool:
    return request.path.startswith("/api/")


# RFC 9110 requires a 401 to name the way to authenticate; the API takes a bearer token.
API_CHALLENGE = 'Bearer realm="Plumbline API"'
NOT_SIGNED_IN = "Sign in or send a valid API token (Authorization: Bearer)."


def _deny(status: int, message: str):
    if is_api():
        response = jsonify({"error": message, "status": status})
        response.status_code = status
        if status == 401:
            response.headers["WWW-Authenticate"] = API_CHALLENGE
        abort(response)
    abort(status, description=message)


def _load_user() -> None:
    g.user, g.via_token, g.token_scope = None, False, None
    db = database()
    auth = request.headers.get("Authorization", "")
    if auth.startswith("Bearer "):
        g.via_token = True
        now = utcnow()
        with db.session(write=False) as s:
            found = accounts.token_use(s, auth[7:].strip(), now=now)
        if found is None:
            return
        g.user, g.token_scope = found.user, found.scope
        # last_used_at at most once a minute per token, so that reading is not a write each time.
        if accounts.token_touch_due(found, now):
            with db.transaction() as s:
                accounts.touch_token(s, found, now)
        return
    token = session.get("sid")
    if not token:
        return
    cfg = current_app.config
    now = utcnow()
    idle = timedelta(minutes=int(cfg["SESSION_IDLE_MINUTES"]))
    max_age = timedelta(hours=int(cfg["SESSION_MAX_HOURS"]))
    if request.method in WRITE_METHODS:
        # Not the request's session: that one writes, and would take the write lock now.
        with db.session(write=False) as s:
            found = accounts.session_user(s, token, idle=idle, max_age=max_age, now=now)
    else:
        # A read: the request's own read session, one connection for the whole request; the
        # user remembered from an earlier read while nothing stored has changed.
        found = _read_session_user(token, idle=idle, max_age=max_age, now=now)
    if found is None:
        session.pop("sid", None)
        return
    g.user, row = found
    # Touch at most once a minute so that reading pages is not a write per request.
    if (now - row.last_seen_at).total_seconds() > 60:
        with db.transaction() as s:
            s.execute(update(UserSession).where(UserSession.id == row.id)
                      .values(last_seen_at=now))
        freshness.touched(accounts.sha256_hex(token), now)


def _read_session_user(token: str, *, idle: timedelta, max_age: timedelta, now):
    """accounts.session_user for a read request, through app.web.freshness: the same limits
    (revoked, inactive, idle, too old) judged on every request."""
    key = accounts.sha256_hex(token)
    recalled = freshness.recall_user(key)
    if recalled is not None:
        user, row = recalled
        if (row.revoked_at is None and user.active and now - row.last_seen_at <= idle
                and now - row.created_at <= max_age):
            return user, row
    found = accounts.session_user(get_session(), token, idle=idle, max_age=max_age, now=now)
    if found is not None:
        freshness.remember_user(key, *found)
    return found


def enforce_access():
    """before_request: identify the user, check the view's declared roles, check CSRF.

    An API route answers 401 to a request without valid credentials before anything else about
    the request (CSRF token, body) is looked at; pages check the CSRF token first.
    """
    roles = allowed_roles(request.endpoint)
    if request.endpoint is None:
        return None  # routing will answer 404/405
    if request.endpoint == "static":
        return None
    g.reads_only = request.method in WRITE_METHODS and not _writes()
    _load_user()
    if roles is None:
        # A route without a declaration is refused for everyone (and fails the route tests).
        _deny(403, "This page has no access rule and is refused.")
    if is_api() and PUBLIC not in roles and g.user is None:
        _deny(401, NOT_SIGNED_IN)
    if g.token_scope == accounts.READ and _writes():
        _deny(403, f"This API token has the scope '{accounts.READ}': it may only read (GET). "
                   f"A {request.method} needs a token with the scope '{accounts.READ_WRITE}'.")
    if request.method in WRITE_METHODS and not g.via_token:
        sent = request.headers.get("X-CSRF-Token") or request.form.get("csrf_token")
        expected = session.get("csrf")
        if not expected or not sent or not secrets.compare_digest(sent, expected):
            _deny(400, "The form's security token is missing or expired; reload the page and "
                       "try again.")
    if PUBLIC in roles:
        return None
    if (g.user is not None and g.user.must_change_password
            and request.endpoint not in PASSWORD_CHANGE_ENDPOINTS):
        if is_api() or g.via_token:
            _deny(403, "Change your one-time password on your account page first.")
        flash("Choose a new password to replace the one-time password you were given.")
        return redirect(url_for("account.page"))
    if g.user is None:
        if is_api() or g.via_token:
            _deny(401, NOT_SIGNED_IN)
        return redirect(url_for("auth.login", next=request.full_path.rstrip("?")))
    if SIGNED_IN in roles or g.user.has_role(*roles):
        check_team()
        return None
    _deny(403, "Your roles do not allow this. Needed: " + ", ".join(sorted(roles)) + ".")
    return None


def check_team() -> None:
    """Every study, fit, data version or setpoint proposal named in the address must be one
    the user may read (app.workflow.teams), or the route answers 404 as for a missing row,
    before the view runs. A refused write under an existing study is audited."""
    args = request.view_args or {}
    named = [(kind, args[kind]) for kind in teams.LOOKUPS if kind in args]
    if not named:
        return
    if not _writes():
        for kind, object_id in named:
            if not freshness.readable(g.user, kind, object_id, lambda k=kind, i=object_id:
                                      teams.may_read(get_session(), g.user, k, i)):
                teams.LOOKUPS[kind](get_session(), g.user, object_id)  # its own 404
        return
    # A write: not the request's session, which would take the write lock now.
    db = database()
    with db.session(write=False) as s:
        try:
            for kind, object_id in named:
                teams.LOOKUPS[kind](s, g.user, object_id)
            return
        except NotFound as exc:
            refused, study_id = exc, teams.study_id_of(s, kind, object_id)
    if study_id is not None:
        with db.transaction() as s:
            teams.record_refusal(s, s.get(User, g.user.id), study_id,
                                 request.endpoint or request.path, refused)
    raise refused
