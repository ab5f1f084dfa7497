"""What a read request may reuse from earlier requests, and how it knows nothing has changed.

Every change to the stored records goes through a service that appends an audit event in the
same transaction, and every event moves the audit chain head (sequence number and hash): so the
chain position read at the start of a request says whether anything stored could differ from
when an earlier request looked. It is read once per request (``chain_position``) and keys:

* rendered pages (app.web.pagecache);
* the signed-in user behind a session cookie (``remember_user``/``recall_user``): signing in
  and out, deactivation, role, name and password changes are all audited. Idle and age limits
  are still judged on every request against the clock, and the once-a-minute ``last_seen_at``
  touch (not an event) updates the remembered copy;
* a user's right to read a study, fit, data version or proposal (``readable``): team and role
  changes are audited, and those rows are never deleted.

Each request gets its own copy of a remembered user (``Session.merge(load=False)``, no query),
so no object is shared between threads. Writes never use what is remembered here.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, NamedTuple

from flask import current_app, g
from sqlalchemy import select
from sqlalchemy.orm import make_transient_to_detached

from app.caches import MB, ByteCache
from app.store.db import change_marker, get_session
from app.store.models import ChainHead, User

_HEAD = ChainHead.__table__
_CHAIN_HEAD = select(_HEAD.c.seq, _HEAD.c.hash).where(_HEAD.c.id == 1)
# Entries are small and fixed in shape: counted at a flat size each.
_ENTRY_BYTES = 2048
_USER_COLUMNS = tuple(c.key for c in User.__mapper__.column_attrs)


def marker() -> tuple[str, int] | None:
    """The request's connection change marker (app.store.db.change_marker), read once."""
    if "change_marker" not in g:
        g.change_marker = change_marker(get_session())
    return g.change_marker


def chain_position() -> tuple[int, str]:
    """The audit chain head (sequence number and hash), read once per request; on SQLite
    reused from this connection's last reading while no connection has committed since."""
    if "chain_position" not in g:
        seen = marker()
        cache = _cache("plumbline.chain_positions")
        found = None if seen is None else cache.get(seen)
        if found is None:
            row = get_session().execute(_CHAIN_HEAD).first()
            found = (0, "") if row is None else (row[0], row[1])
            if seen is not None:
                cache.put(seen, found)
        g.chain_position = found
    return g.chain_position


class SessionRow(NamedTuple):
    """The fields of a server-side session row that access control reads."""

    id: int
    revoked_at: datetime | None
    last_seen_at: datetime
    created_at: datetime


class _Remembered(NamedTuple):
    position: tuple[int, str]
    user: User  # detached, never attached to any session: requests get merged copies
    row: SessionRow


def _cache(name: str) -> ByteCache:
    app = current_app._get_current_object()
    found = app.extensions.get(name)
    if found is None:
        found = app.extensions.setdefault(name, ByteCache(4 * MB, sizeof=lambda _v: _ENTRY_BYTES))
    return found


def recall_user(token_sha256: str) -> tuple[User, SessionRow] | None:
    """The user and session row remembered for this token at this chain position, as a copy
    belonging to the request's session; None when not remembered or anything has changed."""
    hit = _cache("plumbline.session_users").get(token_sha256)
    if hit is None or hit.position != chain_position():
        return None
    return get_session().merge(hit.user, load=False), hit.row


def remember_user(token_sha256: str, user: User, row: Any) -> None:
    """Keep a detached copy of ``user`` and the session ``row`` for later read requests."""
    copy = User(**{key: getattr(user, key) for key in _USER_COLUMNS})
    make_transient_to_detached(copy)
    _cache("plumbline.session_users").put(token_sha256, _Remembered(
        chain_position(), copy, SessionRow(row.id, row.revoked_at, row.last_seen_at,
                                           row.created_at)))


def touched(token_sha256: str, last_seen_at: datetime) -> None:
    """The session row's ``last_seen_at`` was written: remember the new value."""
    cache = _cache("plumbline.session_users")
    hit = cache.get(token_sha256)
    if hit is not None:
        cache.put(token_sha256, hit._replace(row=hit.row._replace(last_seen_at=last_seen_at)))


def readable(user: User, kind: str, object_id: int, check) -> bool:
    """``check()`` (the teams rule), remembered per user, roles, object and chain position
    when it allows (a refusal is asked again: it costs nothing to repeat a 404)."""
    key = (user.id, user.roles, kind, object_id, chain_position())
    cache = _cache("plumbline.readable")
    if cache.get(key):
        return True
    allowed = bool(check())
    if allowed:
        cache.put(key, True)
    return allowed
