"""The API token services: scope and expiry, the password proof a signed-in maker needs, and
revocation of every token in the same transaction as a password change."""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlalchemy import select

from app.store.base import utcnow
from app.store.models import ApiToken, AuditEvent
from app.workflow import WorkflowError, accounts, signing
from tests.conftest import PASSWORD
from tests.workflow import helpers as h

NEW_PASSWORD = "a brand new pass phrase"  # noqa: S105  (test accounts only)


def _token(db, username="erin", **options) -> str:
    with db.transaction() as s:
        return accounts.create_token(s, None, h.user(s, username), "tests", **options)[1]


def _active(db, username="erin") -> int:
    with db.session() as s:
        return len(s.scalars(select(ApiToken).where(
            ApiToken.user_id == h.user(s, username).id, ApiToken.revoked_at.is_(None))).all())


def test_defaults_read_write_and_ninety_days(db, users):
    with db.transaction() as s:
        row, _raw = accounts.create_token(s, None, h.user(s, "erin"), "tests")
        assert row.scope == accounts.READ_WRITE
        assert row.expires_at - row.created_at == timedelta(days=90)


@pytest.mark.parametrize(("options", "field"), [({"scope": "write"}, "scope"),
                                                ({"scope": ""}, "scope"),
                                                ({"days": 0}, "days"),
                                                ({"days": "soon"}, "days"),
                                                ({"days": 400}, "days")])
def test_scope_and_days_are_checked(db, users, options, field):
    with pytest.raises(WorkflowError) as refused, db.transaction() as s:
        accounts.create_token(s, None, h.user(s, "erin"), "tests", **options)
    assert refused.value.field == field


def test_expired_token_is_not_valid(db, users):
    now = utcnow()
    raw = _token(db, days=1, now=now - timedelta(days=1))
    with db.session() as s:
        assert accounts.token_use(s, raw, now=now) is None
        assert accounts.token_use(s, raw, now=now - timedelta(seconds=1)) is not None


def test_a_signed_in_maker_needs_the_password_proof(db, users):
    with pytest.raises(signing.ProofRejected), db.transaction() as s:
        erin = h.user(s, "erin")
        accounts.create_token(s, erin, erin, "no proof")
    assert _active(db) == 0
    attempt = signing.Attempt(doing="create API token", object_type="user", object_id=0,
                              action="token.create_refused")
    _row, raw = h.signed(db, "erin", PASSWORD, attempt,
                         lambda s, actor, proof: accounts.create_token(s, actor, actor, "ok",
                                                                       proof=proof))
    assert raw.startswith(accounts.TOKEN_PREFIX) and _active(db) == 1


def test_admin_password_reset_revokes_tokens_in_the_same_transaction(db, users):
    _token(db), _token(db), _token(db, "abel")
    # A failure later in the same transaction undoes the revocation with the password change.
    with pytest.raises(RuntimeError), db.transaction() as s:
        accounts.set_password(s, h.user(s, "root"), "erin", NEW_PASSWORD)
        raise RuntimeError("rolled back")
    assert _active(db) == 2
    with db.transaction() as s:
        accounts.set_password(s, h.user(s, "root"), "erin", NEW_PASSWORD)
    assert _active(db) == 0 and _active(db, "abel") == 1
    with db.session() as s:
        events = [e.action for e in s.scalars(select(AuditEvent).order_by(AuditEvent.seq))]
    assert events[-2:] == ["user.set_password", "token.revoke_all"]
    # No tokens left: a further change records no empty revocation.
    with db.transaction() as s:
        accounts.set_password(s, h.user(s, "root"), "erin", PASSWORD + " again")
    with db.session() as s:
        assert s.scalar(select(AuditEvent.action).order_by(AuditEvent.seq.desc())
                        .limit(1)) == "user.set_password"
