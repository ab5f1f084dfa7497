"""The audit chain: append-only triggers and tamper detection on both databases."""

from __future__ import annotations

import pytest
from sqlalchemy import text
from sqlalchemy.exc import DatabaseError

from app.store import audit


def _append(db, n: int) -> None:
    with db.transaction() as s:
        for i in range(n):
            audit.record(s, actor=None, action="test.event", object_type="test", object_id=i,
                         new={"i": i, "note": f"event {i}"})


def _drop_triggers(db, backend: str) -> None:
    with db.transaction() as s:
        if backend == "sqlite":
            s.execute(text("DROP TRIGGER audit_events_no_update"))
            s.execute(text("DROP TRIGGER audit_events_no_delete"))
        else:
            s.execute(text("DROP TRIGGER audit_events_no_update ON audit_events"))


def _verify(db):
    with db.session(write=False) as s:
        return audit.verify(s)


def test_chain_verifies_and_head_moves(db):
    _append(db, 5)
    report = _verify(db)
    assert report.ok and report.checked == 5 and report.head_seq == 5
    with db.session() as s:
        assert audit.chain_head(s) == (5, report.head_hash)


@pytest.mark.parametrize("statement", [
    "UPDATE audit_events SET reason = 'edited' WHERE seq = 2",
    "DELETE FROM audit_events WHERE seq = 2",
])
def test_triggers_refuse_update_and_delete(db, statement):
    _append(db, 3)
    with pytest.raises(DatabaseError, match="append-only"), db.transaction() as s:
        s.execute(text(statement))
    assert _verify(db).ok


def test_one_changed_byte_is_named(db, backend):
    _append(db, 6)
    _drop_triggers(db, backend)
    with db.transaction() as s:
        old = s.execute(text("SELECT new_json FROM audit_events WHERE seq = 4")).scalar_one()
        s.execute(text("UPDATE audit_events SET new_json = :v WHERE seq = 4"),
                  {"v": old.replace("event 3", "event 8")})
    report = _verify(db)
    assert not report.ok and report.broken_seq == 4 and "altered" in report.problem


def test_deleted_event_is_named(db, backend):
    _append(db, 6)
    _drop_triggers(db, backend)
    with db.transaction() as s:
        s.execute(text("DELETE FROM audit_events WHERE seq = 3"))
    report = _verify(db)
    assert not report.ok and report.broken_seq == 3 and "missing" in report.problem


def test_deleted_last_event_is_named(db, backend):
    _append(db, 4)
    _drop_triggers(db, backend)
    with db.transaction() as s:
        s.execute(text("DELETE FROM audit_events WHERE seq = 4"))
    report = _verify(db)
    assert not report.ok and "removed from the end" in report.problem


def test_swapped_events_are_named(db, backend):
    _append(db, 6)
    _drop_triggers(db, backend)
    cols = "seq, at, actor_id, actor_name, action, object_type, object_id, study_id, " \
           "old_json, new_json, reason, prev_hash, hash"
    with db.transaction() as s:
        rows = {r.seq: r for r in s.execute(text(f"SELECT id, {cols} FROM audit_events "
                                                 "WHERE seq IN (2, 5)"))}
        # Move every field of event 2 into row 5's place and back (ids stay, contents swap);
        # unique columns are parked first.
        s.execute(text("UPDATE audit_events SET seq = -seq, hash = 'x' || substr(hash, 2) "
                       "WHERE seq IN (2, 5)"))
        for target_seq, source_seq in ((2, 5), (5, 2)):
            src = rows[source_seq]._mapping
            sets = ", ".join(f"{c} = :{c}" for c in cols.split(", "))
            s.execute(text(f"UPDATE audit_events SET {sets} WHERE id = :target"),
                      {**{c: src[c] for c in cols.split(", ")}, "target": rows[target_seq].id})
    report = _verify(db)
    assert not report.ok and report.broken_seq in (2, 5)
    assert "out of order" in report.problem or "missing" in report.problem


def test_pure_verify_on_exported_events(db):
    _append(db, 3)
    with db.session() as s:
        from sqlalchemy import select

        from app.store.models import AuditEvent

        stored = s.scalars(select(AuditEvent).order_by(AuditEvent.id))
        events = [audit.event_to_dict(e) for e in stored]
        head = {"seq": 3, "hash": events[-1]["hash"]}
    assert audit.verify_chain(events, head).ok
    events[1]["reason"] = "inserted later"
    assert audit.verify_chain(events, head).broken_seq == 2
