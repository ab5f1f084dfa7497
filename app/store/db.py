"""Engines and sessions.

SQLite: WAL, foreign keys on, a busy timeout and ``synchronous=FULL`` (a signature must survive a
power cut). Write transactions start with ``BEGIN IMMEDIATE`` so that two writers queue on the
busy timeout instead of failing with "database is locked" when a read lock is upgraded.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING

from flask import Flask, current_app, g, has_request_context, request
from sqlalchemy import Engine, create_engine, event
from sqlalchemy.orm import Session, sessionmaker

from app.store.keys import SESSION_KEYS

if TYPE_CHECKING:
    from app.store.anchor import AuditAnchor
    from app.store.keys import KeySource

WRITE_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})


POOL_SIZE = 16


def make_engine(url: str, *, write: bool, busy_timeout_ms: int = 15000) -> Engine:
    """Create an engine; for SQLite set the pragmas on every new connection."""
    if not url.startswith("sqlite"):
        return create_engine(url, pool_pre_ping=True)
    # Reads: as many pooled connections as the server has threads (waitress: 8), and some: a
    # connection opened past the pool is closed again after its request, and opening one
    # (file, WAL, pragmas) costs more than a page served from the page cache. Writes take
    # turns (BEGIN IMMEDIATE), so their engine keeps the default pool.
    pool = {} if write else {"pool_size": POOL_SIZE, "max_overflow": POOL_SIZE}
    engine = create_engine(url, connect_args={"timeout": busy_timeout_ms / 1000}, **pool)

    @event.listens_for(engine, "connect")
    def _pragmas(dbapi_conn, _record):
        # Hand transaction control to SQLAlchemy (pysqlite's own BEGIN handling is off).
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cur.execute("PRAGMA synchronous=FULL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _begin(conn):
        conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")

    return engine


class Database:
    """Holds a read engine and a write engine for one application.

    With ``keys``, every session it hands out seals what it writes to the audit trail and the
    signed tables with the integrity key (:mod:`app.store.keys`); with ``anchor``, it appends
    the audit chain's new head to the anchor file after a commit that appended audit events
    (:mod:`app.store.anchor`).
    """

    def __init__(self, url: str, busy_timeout_ms: int = 15000,
                 anchor: AuditAnchor | None = None, keys: KeySource | None = None) -> None:
        self.url = url
        self.write_engine = make_engine(url, write=True, busy_timeout_ms=busy_timeout_ms)
        if url.startswith("sqlite"):
            self.read_engine = make_engine(url, write=False, busy_timeout_ms=busy_timeout_ms)
        else:
            self.read_engine = self.write_engine
        info = {} if keys is None else {SESSION_KEYS: keys}
        self._write = sessionmaker(self.write_engine, expire_on_commit=False, info=info)
        self._read = sessionmaker(self.read_engine, expire_on_commit=False, info=info)
        self.anchor = anchor
        self.keys = keys
        if anchor is not None:
            anchor.watch(self._write)
            anchor.watch(self._read)

    def session(self, *, write: bool = True) -> Session:
        return (self._write if write else self._read)()

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """One write transaction: commit on success, roll back on any exception."""
        with self.session(write=True) as session, session.begin():
            yield session

    def dispose(self) -> None:
        self.write_engine.dispose()
        if self.read_engine is not self.write_engine:
            self.read_engine.dispose()


def init_app(app: Flask) -> None:
    from app.store.anchor import AuditAnchor
    from app.store.keys import KeySource

    keys = KeySource(app)
    app.extensions["plumbline_db"] = Database(
        app.config["DATABASE_URL"], int(app.config["SQLITE_BUSY_TIMEOUT_MS"]),
        anchor=AuditAnchor(app, keys), keys=keys,
    )
    app.teardown_appcontext(_close_session)


def database(app: Flask | None = None) -> Database:
    return (app or current_app).extensions["plumbline_db"]


def get_session() -> Session:
    """The request's session, opened lazily: write engine for state-changing methods, except
    a POST whose view only answers a question (``g.reads_only``, set by app.web.access)."""
    if "db_session" not in g:
        write = (has_request_context() and request.method in WRITE_METHODS
                 and not g.get("reads_only", False))
        g.db_session = database().session(write=write)
    return g.db_session


def _close_session(_exc: BaseException | None) -> None:
    session = g.pop("db_session", None)
    if session is not None:
        session.close()


def change_marker(session: Session) -> tuple[str, int] | None:
    """On SQLite: a token for the session's pooled connection and its ``PRAGMA data_version``,
    which changes whenever any other connection (a service's write, another process, the
    sqlite3 tool) has committed since this connection last asked. Read connections never
    write, so while the pair is the same nothing stored has changed. None on other databases.
    """
    connection = session.connection()
    if connection.dialect.name != "sqlite":
        return None
    token = connection.connection.info.setdefault("plumbline.connection", uuid.uuid4().hex)
    return token, int(connection.exec_driver_sql("PRAGMA data_version").scalar())
