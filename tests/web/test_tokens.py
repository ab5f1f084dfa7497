"""API tokens through the pages, the API and the command line: scope, expiry, last use, the
password asked again before one is made in the browser, and revocation at a password change."""

from __future__ import annotations

import json
import re
import uuid
from datetime import timedelta

from click.testing import CliRunner
from sqlalchemy import select

from app import cli as app_cli
from app import create_app
from app.store.base import utcnow
from app.store.db import database
from app.store.models import ApiToken, AuditEvent, Study, User
from app.web.access import API_CHALLENGE
from app.web.openapi import API_PREFIX
from app.workflow import accounts, signing
from tests.conftest import PASSWORD
from tests.workflow import helpers as h

NEW_PASSWORD = "a brand new pass phrase"  # noqa: S105  (test accounts only)
TOKEN_RE = re.compile(r'<code id="new-token">(plb_[^<]+)</code>')


def _token(db, username="erin", **options) -> str:
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, h.user(s, username), "tests", **options)
    return raw


def _bearer(raw: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {raw}"}


def _row(db, raw: str) -> ApiToken:
    with db.session() as s:
        row = s.scalar(select(ApiToken).where(ApiToken.token_sha256 == accounts.sha256_hex(raw)))
        s.expunge(row)
        return row


def _events(db, action):
    with db.session() as s:
        return [json.loads(e.new_json) for e in s.scalars(
            select(AuditEvent).where(AuditEvent.action == action).order_by(AuditEvent.seq))]


def _studies(db) -> int:
    with db.session() as s:
        return len(s.scalars(select(Study.id)).all())


def test_read_token_reads_but_a_write_is_403_naming_the_scope(client, db, users):
    raw = _token(db, scope=accounts.READ)
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    assert client.head(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    refused = client.post(f"{API_PREFIX}/studies", json={"title": "Not made"},
                          headers=_bearer(raw))
    assert refused.status_code == 403
    assert refused.is_json and refused.json["status"] == 403
    assert "scope 'read'" in refused.json["error"] and "read-write" in refused.json["error"]
    assert _studies(db) == 0
    # The same user's read-write token may write.
    made = client.post(f"{API_PREFIX}/studies", json={"title": "Made"},
                       headers=_bearer(_token(db, scope=accounts.READ_WRITE)))
    assert made.status_code == 201
    assert _studies(db) == 1


def test_expired_token_is_401_like_an_unknown_one(client, db, users):
    long_ago = utcnow() - timedelta(days=31)
    expired = _token(db, days=30, now=long_ago)
    assert _row(db, expired).expires_at < utcnow()
    answer = client.get(f"{API_PREFIX}/studies", headers=_bearer(expired))
    unknown = client.get(f"{API_PREFIX}/studies", headers=_bearer("plb_unknown"))
    assert answer.status_code == unknown.status_code == 401
    assert answer.json == unknown.json
    assert answer.headers["WWW-Authenticate"] == API_CHALLENGE
    still_valid = _token(db, days=32, now=long_ago)
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(still_valid)).status_code == 200


def test_new_token_expires_after_the_configured_days(app, db, users, actions):
    app.config["API_TOKEN_DAYS"] = 7
    actions.login("erin")
    before = utcnow()
    page = actions.client.get("/account/")
    assert 'value="7"' in page.get_data(as_text=True)
    made = actions.post("/account/tokens", {"name": "week", "scope": "read",
                                            "password": PASSWORD})
    raw = TOKEN_RE.search(made.get_data(as_text=True)).group(1)
    row = _row(db, raw)
    assert row.scope == accounts.READ
    assert before + timedelta(days=7) <= row.expires_at <= utcnow() + timedelta(days=7)
    too_long = actions.post("/account/tokens", {"name": "forever", "days": "366",
                                                "password": PASSWORD})
    assert too_long.status_code == 302
    assert [e["cause"] for e in _events(db, "token.create_refused")] == [signing.BAD_INPUT]


def test_last_used_at_is_written_at_most_once_a_minute(client, db, users):
    raw = _token(db)
    assert _row(db, raw).last_used_at is None
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    first = _row(db, raw).last_used_at
    assert first is not None and utcnow() - first < timedelta(minutes=1)
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    assert _row(db, raw).last_used_at == first
    # Older than a minute: the next use writes it again.
    with db.transaction() as s:
        row = s.scalar(select(ApiToken).where(ApiToken.token_sha256 == accounts.sha256_hex(raw)))
        row.last_used_at = first - timedelta(minutes=2)
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    assert _row(db, raw).last_used_at > first - timedelta(minutes=2)
    # A refused token is not touched.
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw + "x")).status_code == 401


def test_password_change_on_the_account_page_revokes_every_token(db, users, actions, client):
    tokens = [_token(db), _token(db)]
    other = _token(db, "abel")
    actions.login("erin")
    changed = actions.post("/account/password", {"current_password": PASSWORD,
                                                 "new_password": NEW_PASSWORD,
                                                 "confirm_password": NEW_PASSWORD})
    assert changed.status_code == 302
    for raw in tokens:
        assert _row(db, raw).revoked_at is not None
        assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 401
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(other)).status_code == 200
    revoked = _events(db, "token.revoke_all")
    assert len(revoked) == 1
    assert sorted(revoked[0]["prefixes"]) == sorted(raw[:10] for raw in tokens)
    assert revoked[0]["why"] == "password changed"


def test_minting_in_the_browser_needs_the_password(db, users, actions, client):
    actions.login("erin")
    missing = actions.post("/account/tokens", {"name": "script", "scope": "read-write"})
    assert missing.status_code == 302
    wrong = actions.post("/account/tokens", {"name": "script", "password": "guess"})
    assert wrong.status_code == 302
    assert "no token was made" in actions.client.get("/account/").get_data(as_text=True)
    with db.session() as s:
        assert s.scalars(select(ApiToken)).all() == []
        assert h.user(s, "erin").reauth_failures == 2
    refusals = _events(db, "token.create_refused")
    assert [(e["attempted"], e["cause"], e["consecutive_failures"]) for e in refusals] == [
        ("create API token", signing.WRONG_PASSWORD, 1),
        ("create API token", signing.WRONG_PASSWORD, 2)]
    assert _events(db, "token.create") == []
    made = actions.post("/account/tokens", {"name": "script", "scope": "read-write",
                                            "days": "30", "password": PASSWORD})
    assert made.status_code == 200
    raw = TOKEN_RE.search(made.get_data(as_text=True)).group(1)
    assert client.get(f"{API_PREFIX}/studies", headers=_bearer(raw)).status_code == 200
    with db.session() as s:
        assert h.user(s, "erin").reauth_failures == 0
    created = _events(db, "token.create")
    assert [(e["prefix"], e["scope"]) for e in created] == [(raw[:10], "read-write")]


def test_wrong_token_passwords_share_the_signing_lock(db, users, actions):
    actions.login("erin")
    for _ in range(signing.Lockout().failures):
        actions.post("/account/tokens", {"name": "script", "password": "guess"})
    assert len(_events(db, "user.reauth_locked")) == 1
    locked = actions.post("/account/tokens", {"name": "script", "password": PASSWORD})
    assert locked.status_code == 302
    assert "locked" in actions.client.get("/account/").get_data(as_text=True)
    with db.session() as s:
        assert s.scalars(select(ApiToken)).all() == []
    assert _events(db, "token.create_refused")[-1]["cause"] == signing.LOCKED


def test_bearer_token_cannot_mint_a_token_without_the_password(db, users, client):
    raw = _token(db)
    answer = client.post("/account/tokens", data={"name": "more"}, headers=_bearer(raw))
    assert answer.status_code == 302
    with db.session() as s:
        assert len(s.scalars(select(ApiToken)).all()) == 1


def test_account_page_shows_scope_expiry_and_last_use(db, users, actions, client):
    raw = _token(db, scope=accounts.READ, days=10)
    client.get(f"{API_PREFIX}/studies", headers=_bearer(raw))
    actions.login("erin")
    page = actions.client.get("/account/").get_data(as_text=True)
    row = _row(db, raw)
    assert "<td>read</td>" in page
    assert row.expires_at.strftime("%Y-%m-%d") in page
    assert 'name="password"' in page and 'name="scope"' in page


def test_cli_makes_tokens_with_scope_and_days(app, db, users, monkeypatch):
    env = {"PLUMBLINE_DATABASE_URL": app.config["DATABASE_URL"],
           "PLUMBLINE_INSTANCE_PATH": app.instance_path,
           "PLUMBLINE_SECRET_KEY": "cli-test-" + uuid.uuid4().hex}
    made = []

    def recording_app():
        made.append(create_app())
        return made[-1]

    monkeypatch.setattr(app_cli, "_app", recording_app)
    try:
        before = utcnow()
        result = CliRunner().invoke(app_cli.main, ["tokens", "create", "erin", "--name", "ci",
                                                   "--scope", "read", "--days", "7"],
                                    env=env, catch_exceptions=False)
        refused = CliRunner().invoke(app_cli.main, ["tokens", "create", "erin",
                                                    "--days", "0"], env=env)
    finally:
        for command_app in made:
            database(command_app).dispose()
    assert result.exit_code == 0, result.output
    raw = result.stdout.strip().splitlines()[-1]
    row = _row(db, raw)
    assert row.scope == accounts.READ
    assert before + timedelta(days=7) <= row.expires_at <= utcnow() + timedelta(days=7)
    assert refused.exit_code != 0 and "1 to 365 days" in refused.output
    with db.session() as s:
        assert s.scalar(select(User.reauth_failures).where(User.username == "erin")) == 0
