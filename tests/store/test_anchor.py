"""The chain head anchored outside the database: one keyed line per committed change."""

from __future__ import annotations

import json
import logging
import stat
from pathlib import Path

import pytest
from sqlalchemy import select, text

from app.store import audit
from app.store.anchor import ANCHOR_FILE, check_anchors
from app.store.keys import KEY_FILE, key_id
from app.store.models import AuditEvent


def _append(db, n: int) -> None:
    with db.transaction() as s:
        for i in range(n):
            audit.record(s, actor=None, action="test.event", object_type="test", object_id=i,
                         new={"i": i})


def _anchor_path(app) -> Path:
    return Path(app.instance_path) / ANCHOR_FILE


def _lines(app) -> list[dict]:
    path = _anchor_path(app)
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


def _chain(db) -> dict[int, str]:
    with db.session(write=False) as s:
        return dict(s.execute(select(AuditEvent.seq, AuditEvent.hash)).all())


def _check(app, db, lines=None):
    lines = _anchor_path(app).read_text().splitlines() if lines is None else lines
    return check_anchors(lines, db.anchor.key(), _chain(db))


def test_one_line_per_committed_change_none_for_a_rollback(app, db):
    _append(db, 3)
    _append(db, 1)
    with db.session() as s:
        head = audit.chain_head(s)
    lines = _lines(app)
    assert [(rec["seq"], rec["hash"]) for rec in lines][-1] == head
    assert [rec["seq"] for rec in lines] == [3, 4]  # the head after each commit, not per event
    with pytest.raises(RuntimeError), db.transaction() as s:
        audit.record(s, actor=None, action="test.event", object_type="test")
        raise RuntimeError("rolled back")
    with db.session() as s:  # a session closed without commit rolls back too
        audit.record(s, actor=None, action="test.event", object_type="test")
    with db.transaction() as s:  # a later commit without events anchors nothing stale
        s.execute(text("SELECT 1"))
    assert len(_lines(app)) == 2
    _append(db, 1)
    assert [rec["seq"] for rec in _lines(app)] == [3, 4, 5]


def test_the_anchor_path_is_the_instance_folder_at_write_time(app, db, tmp_path):
    _append(db, 1)
    assert _anchor_path(app) == tmp_path / "instance" / ANCHOR_FILE
    assert _anchor_path(app).exists()
    app.instance_path = str(tmp_path / "moved")
    Path(app.instance_path).mkdir()
    _append(db, 1)
    assert [rec["seq"] for rec in _lines(app)] == [2]


def test_key_generated_once_with_mode_0600(app, db):
    _append(db, 1)
    key_file = Path(app.instance_path) / KEY_FILE
    assert stat.S_IMODE(key_file.stat().st_mode) == 0o600
    key = key_file.read_text().strip().encode()
    _append(db, 1)
    assert key_file.read_text().strip().encode() == key
    assert {rec["key_id"] for rec in _lines(app)} == {key_id(key)}


def test_configured_key_is_used(app, db):
    app.config["INTEGRITY_KEY"] = "a configured integrity key"
    _append(db, 1)
    assert _lines(app)[0]["key_id"] == key_id(b"a configured integrity key")
    assert not (Path(app.instance_path) / KEY_FILE).exists()


def test_macs_verify_in_any_order_and_a_tampered_line_is_named(app, db):
    for _ in range(3):
        _append(db, 2)
    raw = _anchor_path(app).read_text().splitlines()
    report = _check(app, db, list(reversed(raw)))  # two processes may append out of order
    assert report.ok and report.checked == 3 and report.highest == 6
    forged = json.loads(raw[1])
    forged["seq"] = 3
    report = _check(app, db, [raw[0], json.dumps(forged), raw[2], "not json"])
    assert not report.ok
    assert report.problems() == ["anchor line 2 (head #3) has an invalid MAC (altered)",
                                 "anchor line 4 is not an anchor record"]


def test_lines_under_another_key_are_not_checkable(app, db):
    _append(db, 2)
    raw = _anchor_path(app).read_text().splitlines()
    app.config["INTEGRITY_KEY"] = "the key after a rotation"
    report = _check(app, db, raw)
    assert report.ok and report.checked == 0
    assert report.notes() == [f"1 anchor line(s) made with key {json.loads(raw[0])['key_id']} "
                              "cannot be checked: that key is not held here"]


def test_an_unwritable_anchor_file_never_fails_the_commit(app, db, caplog):
    _anchor_path(app).mkdir()  # a directory where the file should be: every open fails
    with caplog.at_level(logging.ERROR, logger="app.store.anchor"):
        _append(db, 1)
    with db.session() as s:
        assert audit.chain_head(s)[0] == 1
    assert "could not append audit head #1" in caplog.text


def _remove_tail(db, backend: str, keep: int) -> None:
    """What a database writer can do: delete the last events and move the head back."""
    with db.transaction() as s:
        if backend == "sqlite":
            triggers = s.execute(text(
                "SELECT name, sql FROM sqlite_master WHERE type = 'trigger' "
                "AND tbl_name IN ('audit_events', 'chain_head')")).all()
            for name, _sql in triggers:
                s.execute(text(f'DROP TRIGGER "{name}"'))
        else:
            triggers = []
            s.execute(text("DROP TRIGGER audit_events_no_update ON audit_events"))
        s.execute(text("DELETE FROM audit_events WHERE seq > :keep"), {"keep": keep})
        s.execute(text("UPDATE chain_head SET seq = :keep, hash = (SELECT hash FROM "
                       "audit_events WHERE seq = :keep) WHERE id = 1"), {"keep": keep})
        for _name, sql in triggers:
            s.execute(text(sql))


def test_a_removed_tail_passes_the_chain_but_not_the_anchors(app, db, backend):
    for _ in range(4):
        _append(db, 2)
    assert _check(app, db).ok
    _remove_tail(db, backend, keep=5)
    with db.session(write=False) as s:
        assert audit.verify(s).ok  # the chain alone cannot tell
    report = _check(app, db)
    assert not report.ok and sorted(report.missing) == [6, 8]
    assert report.problems()[0].startswith("anchored head #8 is missing from the chain")
