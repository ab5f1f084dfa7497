"""The audit trail: an append-only, hash-chained event log.

Each event's hash is SHA-256 over a canonical JSON of its fields and the previous event's hash,
so :func:`verify_chain` names the first altered, missing or reordered event. Each event is also
sealed: HMAC-SHA-256 of its hash under the integrity key, whose id it keeps
(:mod:`app.store.keys`). Anyone can recompute the hashes (a record package is checked offline
that way); only the key's holder can make seals, so an event rewritten and re-hashed by someone
who can write the database but lacks the key fails its seal. Appends lock the
single ``chain_head`` row, which serializes them on PostgreSQL (``SELECT … FOR UPDATE``); on
SQLite write transactions already begin IMMEDIATE.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Callable, Iterable, Iterator
from contextlib import closing
from dataclasses import dataclass
from datetime import datetime
from operator import itemgetter
from typing import Any

from sqlalchemy import String, func, select, type_coerce
from sqlalchemy.orm import Session

from app.store.base import utcnow
from app.store.keys import Keyring, macs, ring_of, same_seal, sealing_ring
from app.store.models import AuditEvent, ChainHead

GENESIS_HASH = "0" * 64
# session.info key: the head this transaction moved the chain to, anchored after the commit
# (app.store.anchor).
PENDING_HEAD = "plumbline_audit_head"
HASHED_FIELDS = (
    "seq", "at", "actor_id", "actor_name", "action", "object_type", "object_id", "study_id",
    "old_json", "new_json", "reason", "prev_hash",
)


# What json.dumps(value, sort_keys=True, ...) builds on every call, built once.
_CANONICAL = json.JSONEncoder(sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                              allow_nan=False, default=str)


def canonical_json(value: Any) -> str:
    """Deterministic JSON used for everything that is hashed."""
    return _CANONICAL.encode(value)


def iso(at: datetime | str) -> str:
    return at if isinstance(at, str) else at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


# How SQLite stores an event time (app.store.base.UTCDateTime): naive UTC, microseconds.
_SQLITE_TIME = re.compile(r"[1-9][0-9]{3}-[0-9]{2}-[0-9]{2} [0-9]{2}:[0-9]{2}:[0-9]{2}\.[0-9]{6}")


def stored_iso(at: datetime | str) -> str:
    """:func:`iso` of an event time as the driver returns it undecoded: a string as SQLite
    stores it (read as :class:`~app.store.base.UTCDateTime` would, by ``fromisoformat``) or a
    naive UTC datetime (PostgreSQL)."""
    if isinstance(at, str):
        if _SQLITE_TIME.fullmatch(at):
            return f"{at[:10]}T{at[11:]}Z"  # the same text, sooner
        at = datetime.fromisoformat(at)
    if at.tzinfo is None and at.year >= 1000:
        return at.isoformat(timespec="microseconds") + "Z"  # the same text, sooner
    return iso(at)


# JSON text of a string, as canonical_json writes it (ensure_ascii=False).
_json_string = json.encoder.encode_basestring


def hashed_json(fields: dict[str, Any]) -> str:
    """:func:`canonical_json` of an event's hashed fields (``at`` as ISO-8601 UTC)."""
    get = fields.get
    return _hashed_text(tuple(get(name) for name in EVENT_COLUMNS), iso(get("at")))


def _hashed_text(row: Any, at: str) -> str:
    """:func:`hashed_json` of an event given as a row of ``EVENT_COLUMNS`` (its ``at``
    aside, in ISO form).

    Verifying a trail does this once per event, so the usual case (integers, strings and
    None where the columns have them) is written out directly, keys in sorted order; anything
    else goes through :func:`canonical_json`. tests/store/test_verify_batches.py holds the two
    to the same text.
    """
    (_id, seq, _at, actor_id, actor_name, action, object_type, object_id, study_id, old, new,
     reason, prev_hash) = row[:13]
    if (type(seq) is int and (actor_id is None or type(actor_id) is int)
            and (study_id is None or type(study_id) is int)):
        try:
            return (
                f'{{"action":{_json_string(action)},'
                f'"actor_id":{"null" if actor_id is None else actor_id},'
                f'"actor_name":{_json_string(actor_name)},"at":{_json_string(at)},'
                f'"new_json":{"null" if new is None else _json_string(new)},'
                f'"object_id":{"null" if object_id is None else _json_string(object_id)},'
                f'"object_type":{_json_string(object_type)},'
                f'"old_json":{"null" if old is None else _json_string(old)},'
                f'"prev_hash":{_json_string(prev_hash)},'
                f'"reason":{"null" if reason is None else _json_string(reason)},'
                f'"seq":{seq},"study_id":{"null" if study_id is None else study_id}}}')
        except TypeError:
            pass  # not a string where one belongs
    return canonical_json(dict(zip(HASHED_FIELDS, (
        seq, at, actor_id, actor_name, action, object_type, object_id, study_id, old, new,
        reason, prev_hash), strict=True)))


def event_hash(fields: dict[str, Any]) -> str:
    """SHA-256 of an event's hashed fields (``at`` as ISO-8601 UTC)."""
    return hashlib.sha256(hashed_json(fields).encode()).hexdigest()


def event_to_dict(event: AuditEvent) -> dict[str, Any]:
    out = {name: getattr(event, name) for name in HASHED_FIELDS}
    out["at"] = iso(event.at)
    out["id"] = event.id
    out["hash"] = event.hash
    out["key_id"] = event.key_id
    out["seal"] = event.seal
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
    ring = sealing_ring(session)
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
    fields["key_id"], fields["seal"] = ring.seal("event", fields["hash"])
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
    # Events whose seal was checked with the integrity key; events written before sealing
    # began (an unsealed start of the chain); None when no key ring was given (offline).
    sealed: int | None = None
    unsealed_start: int = 0
    # What the broken event was about, e.g. "fit.return on fit 3".
    broken_subject: str | None = None

    def describe(self) -> str:
        if not self.ok:
            about = ", ".join(str(part) for part in (
                None if self.broken_id is None else f"id {self.broken_id}",
                self.broken_subject) if part)
            about = f" ({about})" if about else ""
            return f"chain broken at event #{self.broken_seq}{about}: {self.problem}"
        seals = ("" if self.sealed is None else
                 f", {self.sealed} seals checked with the integrity key" +
                 (f" ({self.unsealed_start} events from before sealing began)"
                  if self.unsealed_start else ""))
        return (f"chain intact: {self.checked} events{seals}, head #{self.head_seq} "
                f"{self.head_hash}")


def _seal_problem(ring: Keyring, ev: dict[str, Any], sealing_began: bool) -> str | None:
    kid, seal = ev.get("key_id"), ev.get("seal")
    if not kid and not seal:
        return ("it has no seal although earlier events do (written or rewritten without the "
                "integrity key)") if sealing_began else None
    held = ring.holds("event", ev["hash"], kid, seal)
    if held is None:
        return f"it is sealed with key {kid}, which is not held here (no retired key of that id)"
    if not held:
        return ("its seal does not match its hash (rewritten and re-hashed without the "
                "integrity key)")
    return None


class _Chain:
    """The running state of a chain check: events are checked one by one (:meth:`step`, which
    names the first that does not hold) or a batch at a time (:meth:`feed`)."""

    def __init__(self, ring: Keyring | None) -> None:
        self.ring = ring
        self.prev_hash, self.expected_seq, self.checked = GENESIS_HASH, 1, 0
        self.sealed = self.unsealed = 0
        self.last_seq: Any = 0  # the last event that holds is (last_seq, prev_hash)

    def broken(self, seq: Any, ev_id: Any, problem: str, ev: dict | None = None) -> ChainReport:
        subject = None
        if ev is not None:
            subject = f"{ev.get('action')} on {ev.get('object_type')}"
            if ev.get("object_id") is not None:
                subject += f" {ev.get('object_id')}"
        return ChainReport(False, self.checked, self.last_seq, self.prev_hash, seq, ev_id,
                           problem, None if self.ring is None else self.sealed, self.unsealed,
                           subject)

    def step(self, ev: dict[str, Any]) -> ChainReport | None:
        """Check one event: None when it holds, else the report naming it."""
        seq, ev_id, expected_seq = ev.get("seq"), ev.get("id"), self.expected_seq
        if seq != expected_seq:
            if isinstance(seq, int) and seq > expected_seq:
                return self.broken(expected_seq, ev_id,
                                   f"event #{expected_seq} is missing (next present is #{seq})")
            return self.broken(seq, ev_id,
                               f"out of order: expected #{expected_seq}, found #{seq}")
        if ev.get("prev_hash") != self.prev_hash:
            return self.broken(seq, ev_id, "its link to the previous event does not match "
                                           "(missing or reordered event before it)", ev)
        if event_hash(ev) != ev.get("hash"):
            return self.broken(seq, ev_id, "its content does not match its hash (altered)", ev)
        if self.ring is not None:
            problem = _seal_problem(self.ring, ev, self.sealed > 0)
            if problem:
                return self.broken(seq, ev_id, problem, ev)
            if ev.get("seal"):
                self.sealed += 1
            else:
                self.unsealed += 1
        self.prev_hash, self.expected_seq = ev["hash"], expected_seq + 1
        self.checked, self.last_seq = self.checked + 1, seq
        return None

    def feed(self, rows: list[Any], ats: list[str]) -> ChainReport | None:
        """Check a batch of stored rows (``EVENT_COLUMNS``; ``ats`` their times in ISO form):
        None when all hold, else the report naming the first that does not (found by
        :meth:`step`, so in the same words)."""
        if rows and self._all_hold(rows, ats):
            return None
        for row, at in zip(rows, ats, strict=True):
            report = self.step(_event(row, at))
            if report is not None:
                return report
        return None

    def _all_hold(self, rows: list[Any], ats: list[str]) -> bool:
        """Whether :meth:`step` would pass every row (then the state moves past them); False
        leaves the state as it was. The same conditions, checked for the batch at once:
        consecutive sequence numbers, links, hashes, and every seal held (or, before any seal,
        none)."""
        n, first = len(rows), self.expected_seq
        seqs = [row[_SEQ] for row in rows]
        hashes = [row[_HASH] for row in rows]
        if (seqs != list(range(first, first + n))
                or [row[_PREV] for row in rows] != [self.prev_hash, *hashes[:-1]]):
            return False
        sha256 = hashlib.sha256
        if hashes != [sha256(_hashed_text(row, at).encode()).hexdigest()
                      for row, at in zip(rows, ats, strict=True)]:
            return False
        if self.ring is not None:
            kids, seals = [row[_KEY_ID] for row in rows], [row[_SEAL] for row in rows]
            if all(kids) and all(seals):
                if not self._seals_hold(kids, seals, hashes):
                    return False
                self.sealed += n
            elif not self.sealed and not any(kids) and not any(seals):
                self.unsealed += n
            else:
                return False
        self.prev_hash, self.expected_seq = hashes[-1], first + n
        self.checked, self.last_seq = self.checked + n, seqs[-1]
        return True

    def _seals_hold(self, kids: list[str], seals: list[str], hashes: list[str]) -> bool:
        """Whether every seal is the integrity key's seal of its event's hash."""
        assert self.ring is not None  # noqa: S101  (only called with a ring)
        for kid in set(kids):
            key = self.ring.key(kid)
            if key is None:
                return False
            mine = [i for i, k in enumerate(kids) if k == kid]
            made = macs(key, "event", (hashes[i] for i in mine))
            if not all(same_seal(seals[i], seal)
                       for i, seal in zip(mine, made, strict=True)):
                return False
        return True

    def end(self, head: dict[str, Any] | None) -> ChainReport:
        """The report once every event held: the seals as a whole and the recorded head."""
        if self.ring is not None and self.checked and not self.sealed:
            return self.broken(self.last_seq, None,
                               "no event carries a seal under the integrity key (seals "
                               "removed, or a trail from before sealing began: `plumbline db "
                               "upgrade` seals its end)")
        if head is not None and (head.get("seq") != self.last_seq
                                 or head.get("hash") != self.prev_hash):
            return self.broken(head.get("seq"), None,
                               f"the chain head records #{head.get('seq')} but the last event "
                               f"present is #{self.last_seq} (events removed from the end)")
        return ChainReport(True, self.checked, self.last_seq, self.prev_hash,
                           sealed=None if self.ring is None else self.sealed,
                           unsealed_start=self.unsealed)


def verify_chain(events: Iterable[dict[str, Any]], head: dict[str, Any] | None,
                 ring: Keyring | None = None) -> ChainReport:
    """Check hashes, links, sequence numbers and, with ``ring``, seals; name the first event
    that does not hold. Unsealed events are accepted only before the first sealed one."""
    chain = _Chain(ring)
    for ev in events:
        report = chain.step(ev)
        if report is not None:
            return report
    return chain.end(head)


EVENT_COLUMNS = ("id", *HASHED_FIELDS, "hash", "key_id", "seal")
_SEQ, _AT, _PREV, _HASH, _KEY_ID, _SEAL = (EVENT_COLUMNS.index(name) for name in (
    "seq", "at", "prev_hash", "hash", "key_id", "seal"))
_ACTION, _OBJECT_TYPE = EVENT_COLUMNS.index("action"), EVENT_COLUMNS.index("object_type")
# Events read and checked at a time; only one batch is held in memory.
BATCH = 2000


def _stored_rows(session: Session) -> Iterator[list[Any]]:
    """Every stored event as a row of ``EVENT_COLUMNS`` (the time undecoded), in insertion (id)
    order, in lists of ``BATCH``: one query, streamed, so the rows read are one consistent
    snapshot.

    On PostgreSQL through a server-side cursor; on SQLite, whose driver streams the rows of a
    query itself, through the driver's cursor on the session's connection (the rows need no
    conversion, and this is a third of the time a verify takes).
    """
    table = AuditEvent.__table__
    query = select(*(type_coerce(table.c[name], String) if name == "at" else table.c[name]
                     for name in EVENT_COLUMNS)).order_by(table.c.id)
    connection = session.connection()
    if connection.dialect.name == "sqlite":
        cursor = connection.connection.driver_connection.cursor()
        try:
            cursor.execute(str(query.compile(dialect=connection.dialect)))
            while rows := cursor.fetchmany(BATCH):
                yield rows
        finally:
            cursor.close()
        return
    result = connection.execute(query.execution_options(yield_per=BATCH))
    try:
        yield from result.partitions()
    finally:
        result.close()  # the server-side cursor, when the reader stops early


def _event(row: Any, at: str) -> dict[str, Any]:
    ev = dict(zip(EVENT_COLUMNS, row, strict=True))
    ev["at"] = at
    return ev


def stored_events(session: Session) -> Iterator[dict[str, Any]]:
    """Every stored event as a dict, in insertion (id) order, read ``BATCH`` at a time."""
    with closing(_stored_rows(session)) as batches:
        for rows in batches:
            for row in rows:
                yield _event(row, stored_iso(row[_AT]))


def verify(session: Session, ring: Keyring | None = None, *,
           observe: Callable[[dict[str, Any]], None] | None = None,
           wants: Callable[[str, str], bool] | None = None) -> ChainReport:
    """Verify the whole stored chain against the recorded head; seals too, with the session's
    key ring (or ``ring``) when it has one.

    The events are read and checked ``BATCH`` at a time, never all held at once.

    Parameters
    ----------
    session
        A session of the database holding the trail.
    ring
        The key ring to check seals with, instead of the session's.
    observe
        Called with every stored event as a dict, in order: also with those after the first
        one that does not hold, so that one reading serves another check of the whole trail
        (the replay, :func:`app.workflow.replay.verified_replay`).
    wants
        With ``observe``: called with each event's action and object type; ``observe`` is
        called only for the events it accepts.

    Returns
    -------
    ChainReport
        The first event that does not hold, or the head of an intact chain.
    """
    ring = ring if ring is not None else ring_of(session)
    head = session.get(ChainHead, 1)
    head_dict = None if head is None else {"seq": head.seq, "hash": head.hash}
    chain, report, sqlite_time = _Chain(ring), None, _SQLITE_TIME.fullmatch
    # Read in insertion (id) order: a row whose seq does not follow was moved.
    with closing(_stored_rows(session)) as batches:
        for rows in batches:
            # stored_iso, its usual case written out
            ats = [f"{at[:10]}T{at[11:]}Z" if type(at) is str and sqlite_time(at)
                   else stored_iso(at) for at in map(itemgetter(_AT), rows)]
            if observe is not None:
                for row, at in zip(rows, ats, strict=True):
                    if wants is None or wants(row[_ACTION], row[_OBJECT_TYPE]):
                        observe(_event(row, at))
            if report is None:
                report = chain.feed(rows, ats)
            elif observe is None:
                break
    return report if report is not None else chain.end(head_dict)


def begin_sealing(session: Session) -> int | None:
    """Seal the end of a trail written before events were sealed (migration 0007): one sealed
    event naming how many unsealed events come before it, whose hash covers them all. Returns
    that number, or None when there is nothing to do (no events, or some already sealed)."""
    table = AuditEvent.__table__
    if session.scalar(select(table.c.id).where(table.c.seal.is_not(None)).limit(1)) is not None:
        return None
    count = session.scalar(select(func.count()).select_from(table)) or 0
    if not count:
        return None
    record(session, actor=None, action="integrity.sealing_began", object_type="integrity",
           new={"unsealed_events": count},
           reason="events from here on are sealed with the integrity key")
    return count


def chain_head(session: Session) -> tuple[int, str]:
    head = session.get(ChainHead, 1)
    return (0, GENESIS_HASH) if head is None else (head.seq, head.hash)
