"""The audit trail: an append-only, hash-chained event log.

Each event's hash is SHA-256 over a canonical JSON of its fields and the previous event's hash,
so :func:`verify_chain` names the first altered, missing or reordered event. Appends lock the
single ``chain_head`` row, which serializes them on PostgreSQL (``SELECT … FOR UPDATE``); on
SQLite write transactions already begin IMMEDIATE.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.base import utcnow
from app.store.models import AuditEvent, ChainHead

GENESIS_HASH = "0" * 64
# session.info key: the head this transaction moved the chain to, anchored after the commit
# (app.store.anchor).
PENDING_HEAD = "plumbline_audit_head"
HASHED_FIELDS = (
    "seq", "at", "actor_id", "actor_name", "action", "object_type", "object_id", "study_id",
    "old_json", "new_json", "reason", "prev_hash",
)


def canonical_json(value: Any) -> str:
    """Deterministic JSON used for everything that is hashed."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False, default=str)


def _iso(at: datetime | str) -> str:
    return at if isinstance(at, str) else at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def event_hash(fields: dict[str, Any]) -> str:
    """SHA-256 of an event's hashed fields (``at`` as ISO-8601 UTC)."""
    payload = {name: fields.get(name) for name in HASHED_FIELDS}
    payload["at"] = _iso(payload["at"])
    return hashlib.sha256(canonical_json(payload).encode()).hexdigest()


def event_to_dict(event: AuditEvent) -> dict[str, Any]:
    out = {name: getattr(event, name) for name in HASHED_FIELDS}
    out["at"] = _iso(event.at)
    out["id"] = event.id
    out["hash"] = event.hash
    return out


def record(
    session: Session,
    *,
    actor: Any | None,
    action: str,
    object_type: str,
    object_id: Any = None,
    study_id: int | None = None,
    old: Any = None,
    new: Any = None,
    reason: str | None = None,
) -> AuditEvent:
    """Append one event inside the caller's transaction.

    ``actor`` is a User (``id``, ``full_name``, ``username``) or None for the command line.
    """
    head = session.execute(
        select(ChainHead).where(ChainHead.id == 1).with_for_update()
    ).scalar_one()
    fields: dict[str, Any] = {
        "seq": head.seq + 1,
        "at": utcnow(),
        "actor_id": getattr(actor, "id", None),
        "actor_name": (f"{actor.full_name} ({actor.username})" if actor is not None
                       else "command line"),
        "action": action,
        "object_type": object_type,
        "object_id": None if object_id is None else str(object_id),
        "study_id": study_id,
        "old_json": None if old is None else canonical_json(old),
        "new_json": None if new is None else canonical_json(new),
        "reason": reason,
        "prev_hash": head.hash,
    }
    # Hash the stored (microsecond) time exactly as it will be read back.
    fields["hash"] = event_hash(fields)
    event = AuditEvent(**fields)
    session.add(event)
    head.seq = fields["seq"]
    head.hash = fields["hash"]
    session.flush()
    session.info[PENDING_HEAD] = (head.seq, head.hash)
    return event


@dataclass(frozen=True)
class ChainReport:
    ok: bool
    checked: int
    head_seq: int
    head_hash: str
    broken_seq: int | None = None
    broken_id: int | None = None
    problem: str | None = None

    def describe(self) -> str:
        if self.ok:
            return f"chain intact: {self.checked} events, head #{self.head_seq} {self.head_hash}"
        return f"chain broken at event #{self.broken_seq} (id {self.broken_id}): {self.problem}"


def verify_chain(events: Iterable[dict[str, Any]], head: dict[str, Any] | None) -> ChainReport:
    """Check hashes, links and sequence numbers; name the first event that does not hold."""
    prev_hash, expected_seq, checked = GENESIS_HASH, 1, 0
    last = {"seq": 0, "hash": GENESIS_HASH}
    for ev in events:
        seq, ev_id = ev.get("seq"), ev.get("id")
        if seq != expected_seq:
            if isinstance(seq, int) and seq > expected_seq:
                problem = f"event #{expected_seq} is missing (next present is #{seq})"
                return ChainReport(False, checked, last["seq"], last["hash"], expected_seq,
                                   ev_id, problem)
            return ChainReport(False, checked, last["seq"], last["hash"], seq, ev_id,
                               f"out of order: expected #{expected_seq}, found #{seq}")
        if ev.get("prev_hash") != prev_hash:
            return ChainReport(False, checked, last["seq"], last["hash"], seq, ev_id,
                               "its link to the previous event does not match (missing or "
                               "reordered event before it)")
        if event_hash(ev) != ev.get("hash"):
            return ChainReport(False, checked, last["seq"], last["hash"], seq, ev_id,
                               "its content does not match its hash (altered)")
        prev_hash, expected_seq, checked = ev["hash"], expected_seq + 1, checked + 1
        last = {"seq": seq, "hash": ev["hash"]}
    if head is not None and (head.get("seq") != last["seq"] or head.get("hash") != last["hash"]):
        return ChainReport(False, checked, last["seq"], last["hash"], head.get("seq"), None,
                           f"the chain head records #{head.get('seq')} but the last event "
                           f"present is #{last['seq']} (events removed from the end)")
    return ChainReport(True, checked, last["seq"], last["hash"])


def verify(session: Session) -> ChainReport:
    """Verify the whole stored chain against the recorded head."""
    # Read in insertion (id) order: a row whose seq does not follow was moved.
    rows = session.execute(select(AuditEvent).order_by(AuditEvent.id)).scalars()
    head = session.get(ChainHead, 1)
    head_dict = None if head is None else {"seq": head.seq, "hash": head.hash}
    return verify_chain((event_to_dict(e) for e in rows), head_dict)


def chain_head(session: Session) -> tuple[int, str]:
    head = session.get(ChainHead, 1)
    return (0, GENESIS_HASH) if head is None else (head.seq, head.hash)
