"""The integrity key ring: seals, rotation, retired keys, and a trail from before sealing began."""

from __future__ import annotations

import hashlib
import hmac
import os
import stat

import pytest
from sqlalchemy import create_engine, select, text
from sqlalchemy.orm import Session

from app.cli import main
from app.store import audit
from app.store.keys import RETIRED_FILE, Keyring, key_id, mac, parse_retired
from app.store.models import AuditEvent
from tests.test_cli import _add_users

KEY = b"0123456789abcdef0123456789abcdef"


def test_a_seal_is_hmac_sha256_of_the_digest_under_the_key():
    digest = hashlib.sha256(b"anything").hexdigest()
    # Recomputed with the standard library alone, from the documented message layout.
    expected = hmac.new(KEY, b"plumbline/fit\x00" + digest.encode(), hashlib.sha256).hexdigest()
    assert mac(KEY, "fit", digest) == expected
    ring = Keyring(KEY, {})
    kid, seal = ring.seal("fit", digest)
    assert kid == hashlib.sha256(KEY).hexdigest()[:8] and seal == expected
    assert ring.holds("fit", digest, kid, seal) is True
    # A seal of one kind never passes for another, nor for another digest or key.
    assert ring.holds("signature", digest, kid, seal) is False
    assert ring.holds("fit", hashlib.sha256(b"other").hexdigest(), kid, seal) is False
    assert Keyring(b"another key", {}).holds("fit", digest, kid, seal) is None
    assert ring.holds("fit", digest, None, None) is False
    with pytest.raises(ValueError):
        mac(KEY, "unknown kind", digest)


def test_retired_keys_are_read_one_per_line():
    ring = parse_retired(["# kept after the 2026 rotation", "", "old-key-one", " old-key-two "])
    assert ring == {key_id(b"old-key-one"): b"old-key-one", key_id(b"old-key-two"): b"old-key-two"}


def _events(url):
    engine = create_engine(url)
    with Session(engine) as s:
        rows = s.execute(select(AuditEvent.seq, AuditEvent.action, AuditEvent.key_id)
                         .order_by(AuditEvent.seq)).all()
    engine.dispose()
    return rows


def test_rotation_keeps_old_seals_checkable_and_is_on_the_record(cli_env, tmp_path):
    runner, url = cli_env
    _add_users(runner, "abel", "erin")
    instance = tmp_path / "instance"
    old_id = key_id((instance / "integrity_key").read_text().strip().encode())
    refused = runner.invoke(main, ["audit", "rotate-key"])
    assert refused.exit_code == 2 and "--reason" in refused.output
    rotated = runner.invoke(main, ["audit", "rotate-key", "--reason", "yearly rotation"])
    assert rotated.exit_code == 0, rotated.output
    new_id = key_id((instance / "integrity_key").read_text().strip().encode())
    assert new_id != old_id and f"{old_id} -> {new_id}" in rotated.output
    retired = instance / RETIRED_FILE
    assert stat.S_IMODE(os.stat(retired).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(instance / "integrity_key").st_mode) == 0o600
    _add_users(runner, "otto")
    events = _events(url)
    rotation = [e for e in events if e.action == "integrity.key_rotate"]
    assert len(rotation) == 1 and rotation[0].key_id == new_id
    assert {e.key_id for e in events if e.seq < rotation[0].seq} == {old_id}
    assert {e.key_id for e in events if e.seq >= rotation[0].seq} == {new_id}
    verified = runner.invoke(main, ["audit", "verify", "--anchor",
                                    str(instance / "audit-anchor.log")])
    assert verified.exit_code == 0, verified.output
    assert "seals checked with the integrity key" in verified.output
    # Without the retired key, the older seals cannot be vouched for: verify says which key.
    retired.rename(tmp_path / "elsewhere")
    lost = runner.invoke(main, ["audit", "verify"])
    assert lost.exit_code == 1
    assert f"sealed with key {old_id}, which is not held here" in lost.output


def test_a_key_set_in_the_environment_is_rotated_there(cli_env, tmp_path, monkeypatch):
    runner, url = cli_env
    monkeypatch.setenv("PLUMBLINE_INTEGRITY_KEY", "first configured key")
    _add_users(runner, "abel")
    refused = runner.invoke(main, ["audit", "rotate-key", "--reason", "r"])
    assert refused.exit_code == 2 and "PLUMBLINE_INTEGRITY_RETIRED_KEYS" in refused.output
    monkeypatch.setenv("PLUMBLINE_INTEGRITY_KEY", "second configured key")
    not_kept = runner.invoke(main, ["audit", "rotate-key", "--record", "--reason", "r"])
    assert not_kept.exit_code == 2 and "is not among" in not_kept.output
    monkeypatch.setenv("PLUMBLINE_INTEGRITY_RETIRED_KEYS", "first configured key")
    recorded = runner.invoke(main, ["audit", "rotate-key", "--record", "--reason", "r"])
    assert recorded.exit_code == 0, recorded.output
    again = runner.invoke(main, ["audit", "rotate-key", "--record", "--reason", "r"])
    assert again.exit_code == 2 and "already in use" in again.output
    assert runner.invoke(main, ["audit", "verify"]).exit_code == 0
    assert _events(url)[-1].key_id == key_id(b"second configured key")


def test_a_trail_from_before_sealing_is_sealed_at_its_end_by_db_upgrade(cli_env, tmp_path):
    runner, url = cli_env
    _add_users(runner, "abel", "erin")
    # As a database written before migration 0007 looks: no seals on any event.
    engine = create_engine(url)
    with engine.begin() as c:
        c.execute(text("DROP TRIGGER audit_events_no_update"))
        c.execute(text("UPDATE audit_events SET key_id = NULL, seal = NULL"))
    engine.dispose()
    unsealed = runner.invoke(main, ["audit", "verify"])
    assert unsealed.exit_code == 1 and "no event carries a seal" in unsealed.output
    count = len(_events(url))
    upgraded = runner.invoke(main, ["db", "upgrade"])
    assert upgraded.exit_code == 0
    assert f"{count} events written before sealing began" in upgraded.output
    verified = runner.invoke(main, ["audit", "verify"])
    assert verified.exit_code == 0, verified.output
    assert f"({count} events from before sealing began)" in verified.output
    # Once sealing has begun, an unsealed event is refused wherever it stands.
    assert "integrity.sealing_began" == _events(url)[-1].action
    assert runner.invoke(main, ["db", "upgrade"]).output.count("sealing began") == 0


def test_a_session_without_a_key_ring_cannot_write_the_trail(db, users):
    engine = create_engine(db.url)
    with Session(engine) as s, pytest.raises(RuntimeError, match="no integrity key"):
        audit.record(s, actor=None, action="test.write", object_type="test")
    engine.dispose()
