"""Someone who can write the database (file or server) but does not hold the integrity key.

The tools the forgery tests use to play that person: drop every trigger and create them again
afterwards (:func:`triggers_off`), rewrite events and re-hash the chain after them with the
project's own plain SHA-256 formula (:func:`rehash_from`), append an event the same way
(:func:`append_event`), and recompute the plain hashes of signatures and snapshots with the
project's own functions. Whatever they do, they cannot make a seal: they either leave the old
seal in place or remove it.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy import insert, text
from sqlalchemy.orm import Session

from app.store.audit import GENESIS_HASH, canonical_json, event_hash, stored_events
from app.store.base import utcnow
from app.store.models import AuditEvent

KEEP, DROP = "keep the old seals", "remove the seals"


def _triggers(s: Session) -> list[tuple[str, str, str]]:
    """(name, table, DDL) of every trigger."""
    if s.get_bind().dialect.name == "sqlite":
        rows = s.execute(text("SELECT name, tbl_name, sql FROM sqlite_master "
                              "WHERE type = 'trigger'"))
    else:
        rows = s.execute(text("SELECT t.tgname, c.relname, pg_get_triggerdef(t.oid) "
                              "FROM pg_trigger t JOIN pg_class c ON c.oid = t.tgrelid "
                              "WHERE NOT t.tgisinternal"))
    return [tuple(r) for r in rows]


@contextmanager
def triggers_off(db) -> Iterator[Session]:
    """One transaction with every trigger dropped; they are created again before the commit."""
    with db.transaction() as s:
        sqlite = s.get_bind().dialect.name == "sqlite"
        saved = _triggers(s)
        assert saved, "the schema has triggers to drop"
        for name, table, _ddl in saved:
            s.execute(text(f"DROP TRIGGER {name}" if sqlite else f"DROP TRIGGER {name} ON {table}"))
        yield s
        for _name, _table, ddl in saved:
            s.execute(text(ddl))


def events(s: Session, from_seq: int = 1) -> list[dict[str, Any]]:
    """Stored events as the hash formula reads them (typed columns), from ``from_seq`` on."""
    return [ev for ev in stored_events(s) if ev["seq"] >= from_seq]


def rehash_from(s: Session, seq: int, seals: str = KEEP) -> None:
    """Re-hash every event from ``seq`` on with the plain SHA-256 formula, relinking the chain
    and moving the head; ``seals`` keeps or removes their seals."""
    previous = s.execute(text("SELECT hash FROM audit_events WHERE seq = :q"),
                         {"q": seq - 1}).scalar() or GENESIS_HASH
    for ev in events(s, seq):
        ev["prev_hash"] = previous
        ev["hash"] = event_hash(ev)
        values = {"h": ev["hash"], "p": previous, "i": ev["id"]}
        extra = ", key_id = NULL, seal = NULL" if seals == DROP else ""
        s.execute(text(f"UPDATE audit_events SET hash = :h, prev_hash = :p{extra} WHERE id = :i"),
                  values)
        previous = ev["hash"]
        last = ev["seq"]
    s.execute(text("UPDATE chain_head SET seq = :q, hash = :h WHERE id = 1"),
              {"q": last, "h": previous})


def edit_event(s: Session, seq: int, **changes: Any) -> None:
    """Change an event's columns (``new`` / ``old`` as Python values), then re-hash from it."""
    for name in ("new", "old"):
        if name in changes:
            changes[f"{name}_json"] = canonical_json(changes.pop(name))
    sets = ", ".join(f"{k} = :{k}" for k in changes)
    s.execute(text(f"UPDATE audit_events SET {sets} WHERE seq = :seq"), {**changes, "seq": seq})


def new_of(s: Session, seq: int) -> dict[str, Any]:
    return json.loads(s.scalar(text("SELECT new_json FROM audit_events WHERE seq = :q"),
                               {"q": seq}))


def seq_of(s: Session, action: str, object_id: Any) -> int:
    return s.scalar(text("SELECT max(seq) FROM audit_events WHERE action = :a AND "
                         "object_id = :o"), {"a": action, "o": str(object_id)})


def append_event(s: Session, **fields: Any) -> int:
    """Append one event with a plain SHA-256 hash and no seal; returns its seq."""
    head = s.execute(text("SELECT seq, hash FROM chain_head WHERE id = 1")).one()
    ev = {"seq": head[0] + 1, "at": utcnow(), "actor_id": None, "actor_name": "command line",
          "object_id": None, "study_id": None, "old_json": None, "new_json": None,
          "reason": None, "prev_hash": head[1], **fields}
    for name in ("new", "old"):
        if name in ev:
            ev[f"{name}_json"] = canonical_json(ev.pop(name))
    s.execute(insert(AuditEvent.__table__).values(**ev, hash="pending-" + str(ev["seq"])))
    rehash_from(s, ev["seq"], DROP)
    return ev["seq"]
