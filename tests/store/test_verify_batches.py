"""`audit.verify` reads and checks the trail in batches: the same reports as one event at a time.

The reference is :func:`app.store.audit.verify_chain` over every stored event, which checks one
event after another and so words every report as before batching. With the batch patched to 3
events, a break inside a batch, at its edge and across two batches is named in the same words;
the replay fed from the same reading gives what it gives reading the trail on its own.
"""

from __future__ import annotations

import hashlib
import os
from datetime import UTC, datetime

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sqlalchemy import text

from app.store import audit, keys
from app.workflow.replay import disagreements, verified_replay
from tests.store import forger

N = 20


@pytest.fixture
def small_batches(monkeypatch):
    monkeypatch.setattr(audit, "BATCH", 3)


def _append(db, n: int = N) -> None:
    with db.transaction() as s:
        for i in range(n):
            audit.record(s, actor=None, action="test.event", object_type="test", object_id=i,
                         study_id=i % 2 or None, old=None if i % 3 else {"i": i - 1},
                         new={"i": i, "note": f"event {i} «quoted \"text\"»\n"},
                         reason="batches" if i % 4 else None)


def _reference(db) -> audit.ChainReport:
    """The report of the one-event-at-a-time check."""
    with db.session(write=False) as s:
        head = s.get(audit.ChainHead, 1)
        events = list(audit.stored_events(s))
        return audit.verify_chain(events, {"seq": head.seq, "hash": head.hash},
                                  keys.ring_of(s))


def _batched(db) -> audit.ChainReport:
    with db.session(write=False) as s:
        return audit.verify(s)


def _same(db) -> audit.ChainReport:
    report = _batched(db)
    assert report == _reference(db)
    assert report.describe() == _reference(db).describe()
    return report


def test_a_chain_of_several_batches_verifies(db, small_batches):
    _append(db)
    report = _same(db)
    assert report.ok and report.checked == N and report.sealed == N


def test_an_altered_event_in_the_second_batch_is_named_alike(db, small_batches):
    _append(db)
    with forger.triggers_off(db) as s:
        s.execute(text("UPDATE audit_events SET reason = 'edited' WHERE seq = 5"))
    report = _same(db)
    assert not report.ok and report.broken_seq == 5 and "altered" in report.problem
    assert report.checked == 4


@pytest.mark.parametrize("seq", [6, 7])  # the last of the second batch, the first of the third
def test_a_removed_event_at_a_batch_edge_is_named_alike(db, small_batches, seq):
    _append(db)
    with forger.triggers_off(db) as s:
        s.execute(text("DELETE FROM audit_events WHERE seq = :q"), {"q": seq})
    report = _same(db)
    assert not report.ok and report.broken_seq == seq
    assert report.problem == f"event #{seq} is missing (next present is #{seq + 1})"


def test_a_pair_reordered_across_batches_is_named_alike(db, small_batches):
    _append(db)
    cols = ("seq, at, actor_id, actor_name, action, object_type, object_id, study_id, "
            "old_json, new_json, reason, prev_hash, hash, key_id, seal").split(", ")
    with forger.triggers_off(db) as s:
        rows = {r.seq: r for r in s.execute(text(
            f"SELECT id, {', '.join(cols)} FROM audit_events WHERE seq IN (6, 7)"))}
        s.execute(text("UPDATE audit_events SET seq = -seq, hash = 'x' || substr(hash, 2) "
                       "WHERE seq IN (6, 7)"))
        for target, source in ((6, 7), (7, 6)):
            src = rows[source]._mapping
            s.execute(text(f"UPDATE audit_events SET {', '.join(f'{c} = :{c}' for c in cols)} "
                           "WHERE id = :target"),
                      {**{c: src[c] for c in cols}, "target": rows[target].id})
    report = _same(db)
    assert not report.ok and report.broken_seq == 6
    assert report.problem == "event #6 is missing (next present is #7)"


@pytest.mark.parametrize("change", [
    "UPDATE audit_events SET seal = NULL, key_id = NULL WHERE seq = 8",
    "UPDATE audit_events SET seal = CASE WHEN substr(seal, 1, 1) = '0' THEN '1' ELSE '0' END "
    "|| substr(seal, 2) WHERE seq = 8",
    "UPDATE audit_events SET seal = 'é' || substr(seal, 2) WHERE seq = 8",  # not hex, not ASCII
    "UPDATE audit_events SET key_id = 'feedbeef' WHERE seq = 8",
])
def test_a_seal_problem_in_a_later_batch_is_named_alike(db, small_batches, change):
    _append(db)
    with forger.triggers_off(db) as s:
        s.execute(text(change))
    report = _same(db)
    assert not report.ok and report.broken_seq == 8 and "seal" in report.problem


def test_the_head_and_the_unsealed_start_are_checked_alike(db, small_batches):
    _append(db, 8)
    with forger.triggers_off(db) as s:
        s.execute(text("DELETE FROM audit_events WHERE seq = 8"))
    assert "removed from the end" in _same(db).problem
    with forger.triggers_off(db) as s:
        s.execute(text("UPDATE audit_events SET seal = NULL, key_id = NULL WHERE seq <= 4"))
        s.execute(text("UPDATE chain_head SET seq = 7, hash = (SELECT hash FROM audit_events "
                       "WHERE seq = 7)"))
    report = _same(db)
    assert report.ok and report.unsealed_start == 4 and report.sealed == 3


def _objects(db) -> None:
    """Events the replay reads, among others: fits created and moved, an upload."""
    with db.transaction() as s:
        for fit in (1, 2, 3):
            audit.record(s, actor=None, action="fit.create", object_type="fit", object_id=fit,
                         new={"snapshot_sha256": f"{fit:064x}"})
            audit.record(s, actor=None, action="test.event", object_type="test", object_id=fit)
        audit.record(s, actor=None, action="fit.submit", object_type="fit", object_id=2,
                     new={"state": "submitted"})
        audit.record(s, actor=None, action="data.upload", object_type="data_version",
                     object_id=1, new={"original_sha256": "a" * 64, "canonical_sha256": "b" * 64})


def _unbatched(db) -> tuple[audit.ChainReport, list]:
    with db.session(write=False) as s:
        return _reference(db), disagreements(s)


def test_the_replay_over_batches_finds_what_it_finds_alone(db, small_batches):
    _objects(db)
    with db.session(write=False) as s:
        report, found = verified_replay(s)
    assert (report, found) == _unbatched(db)
    assert report.ok and len(found) == 4  # three fits and a data version without rows
    assert {d.object for d in found} == {"fit 1", "fit 2", "fit 3", "data version 1"}


def test_the_replay_reads_past_a_break(db, small_batches):
    _objects(db)
    with forger.triggers_off(db) as s:
        s.execute(text("UPDATE audit_events SET reason = 'edited' WHERE seq = 2"))
    with db.session(write=False) as s:
        report, found = verified_replay(s)
    assert (report, found) == _unbatched(db)
    assert report.broken_seq == 2 and len(found) == 4


# ---- the pieces: the same text, hash and seal as the general functions ---------------------

_text = st.one_of(st.none(), st.text(max_size=30))
_int = st.one_of(st.none(), st.integers(-2**40, 2**40))


@settings(max_examples=300, deadline=None)
@given(seq=st.one_of(st.integers(0, 2**40), st.booleans(),
                     st.floats(allow_nan=False, allow_infinity=False),
                     st.text(max_size=5)),
       actor_id=st.one_of(_int, st.booleans(), st.text(max_size=3)),
       study_id=st.one_of(_int, st.floats(allow_nan=False, allow_infinity=False)),
       strings=st.lists(st.one_of(_text, st.integers(0, 9)), min_size=8, max_size=8))
def test_hashed_json_is_canonical_json(seq, actor_id, study_id, strings):
    names = ("actor_name", "action", "object_type", "object_id", "old_json", "new_json",
             "reason", "prev_hash")
    fields = {"seq": seq, "at": "2026-01-02T03:04:05.000006Z", "actor_id": actor_id,
              "study_id": study_id, **dict(zip(names, strings, strict=True))}
    payload = {name: fields.get(name) for name in audit.HASHED_FIELDS}
    assert audit.hashed_json(fields) == audit.canonical_json(payload)


@pytest.mark.parametrize("stored", [
    "2026-12-03 07:43:01.123456", "2026-12-03 07:43:01", "2026-12-03 07:43:01.5",
    "2026-12-03T07:43:01.123456", "0999-01-01 00:00:00.000001",
    datetime(2026, 12, 3, 7, 43, 1, 123456), datetime(2026, 12, 3, 7, 43, 1),
    datetime(2026, 12, 3, 7, 43, 1, 123456, tzinfo=UTC),
])
def test_stored_times_read_as_the_typed_column_reads_them(stored):
    typed = datetime.fromisoformat(stored) if isinstance(stored, str) else stored
    assert audit.stored_iso(stored) == audit.iso(typed.replace(tzinfo=UTC))


@pytest.mark.parametrize("length", [0, 1, 32, 63, 64, 65, 200])
def test_seals_in_bulk_are_the_seals(length):
    key = os.urandom(length)
    digests = [hashlib.sha256(os.urandom(8)).hexdigest() for _ in range(4)]
    for kind in keys.KINDS:
        assert keys.macs(key, kind, digests) == [keys.mac(key, kind, d) for d in digests]
    with pytest.raises(ValueError, match="unknown seal kind"):
        keys.macs(key, "other", digests)
