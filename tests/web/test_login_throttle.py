"""Sign-in throttling that holds under concurrent attempts, counted per account and per account
and address; throttled attempts in the audit trail; unknown user names kept out of it."""

from __future__ import annotations

import hashlib
import hmac
import threading

import pytest
from sqlalchemy import select

from app.store.models import AuditEvent, LoginFailure
from app.workflow import accounts
from tests.conftest import PASSWORD, Actions

ATTEMPTS = 40


def _post_login(client, csrf: str, username: str, password: str, addr: str = "127.0.0.1"):
    return client.post("/login", data={"username": username, "password": password,
                                       "csrf_token": csrf},
                       environ_base={"REMOTE_ADDR": addr})


def _events(db, action: str) -> list[AuditEvent]:
    with db.session() as s:
        return list(s.scalars(select(AuditEvent).where(AuditEvent.action == action)
                              .order_by(AuditEvent.id)))


@pytest.mark.timeout(300)
def test_concurrent_wrong_logins_evaluate_no_more_passwords_than_the_rule_allows(
        app, users, db, monkeypatch):
    """40 wrong passwords for one account, sent at once: the throttle lets a burst have
    ``free_attempts`` failures plus the one that starts the wait, and no more of them may
    reach the password check however the requests interleave."""
    evaluated: list[str] = []
    real_verify = accounts.verify_password

    def counting_verify(password_hash: str, password: str) -> bool:
        evaluated.append(password)
        return real_verify(password_hash, password)

    monkeypatch.setattr(accounts, "verify_password", counting_verify)
    clients = []
    for _ in range(ATTEMPTS):
        client = app.test_client()
        clients.append((client, Actions(client).csrf()))
    barrier = threading.Barrier(ATTEMPTS, timeout=120)
    statuses: list[int] = []
    errors: list[BaseException] = []

    def attempt(index: int) -> None:
        client, csrf = clients[index]
        try:
            barrier.wait()
            response = _post_login(client, csrf, "erin", f"wrong guess {index}")
            statuses.append(response.status_code)
        except BaseException as exc:  # reported below; one failure must not hang the others
            errors.append(exc)
            barrier.abort()

    threads = [threading.Thread(target=attempt, args=(i,), daemon=True)
               for i in range(ATTEMPTS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=240)
    assert not any(t.is_alive() for t in threads), "a sign-in attempt did not finish"
    assert not errors, errors[:3]

    allowance = accounts.Throttle().free_attempts + 1
    print(f"\n{len(evaluated)} of {ATTEMPTS} concurrent wrong sign-ins had their password "
          f"checked (the rule allows {allowance})")
    assert sorted(set(statuses)) == [401, 429]
    assert len(evaluated) <= allowance
    assert statuses.count(401) == len(evaluated)
    # Every attempt is in the audit trail: each failure, and each refusal as throttled.
    assert len(_events(db, "auth.login_failed")) == statuses.count(401)
    assert len(_events(db, "auth.login_throttled")) == statuses.count(429)
    # The right password, sent now, waits too.
    client, csrf = clients[0]
    assert _post_login(client, csrf, "erin", PASSWORD).status_code == 429


def test_throttled_login_is_audited(client, actions, users, db):
    for _ in range(6):
        assert actions.login("erin", "wrong password 1").status_code == 401
    assert actions.login("erin", PASSWORD).status_code == 429
    (event,) = _events(db, "auth.login_throttled")
    assert '"username":"erin"' in event.new_json
    assert '"remote_addr":"127.0.0.1"' in event.new_json
    assert '"wait_seconds":' in event.new_json
    assert event.object_id is not None and event.actor_id is None


def test_one_address_cannot_lock_out_other_accounts(app, users, db):
    """Failures are counted per account and per account and address, never per address alone:
    one person behind a shared NAT or proxy cannot lock out everyone else there."""
    client = app.test_client()
    csrf = Actions(client).csrf()
    for name in ("nobody-1", "nobody-2", "nobody-3", "nobody-4", "nobody-5"):
        for _ in range(6):
            assert _post_login(client, csrf, name, "wrong password 1",
                               addr="198.51.100.9").status_code == 401
    other = app.test_client()
    assert _post_login(other, Actions(other).csrf(), "erin", PASSWORD,
                       addr="198.51.100.9").status_code == 302


def test_one_account_is_throttled_from_any_address(app, users, db):
    """Many addresses guessing one account are slowed too, with a larger allowance."""
    rules = accounts.Throttle()
    client = app.test_client()
    csrf = Actions(client).csrf()
    per_address = rules.free_attempts
    addresses = rules.account_free_attempts // per_address + 1
    codes = [_post_login(client, csrf, "erin", "wrong password 1", addr=f"192.0.2.{a}").status_code
             for a in range(1, addresses + 1) for _ in range(per_address)]
    assert codes.count(401) == rules.account_free_attempts + 1
    assert _post_login(client, csrf, "erin", PASSWORD, addr="192.0.2.200").status_code == 429


def test_unknown_user_name_is_recorded_only_as_a_keyed_hash(app, client, actions, users, db):
    typed = "Hunter2-Typed-In-The-Name-Field"
    assert actions.login(typed, "whatever-password").status_code == 401
    assert actions.login("erin", "wrong password 1").status_code == 401
    key = app.config["SECRET_KEY"].encode()
    digest = hmac.new(key, typed.lower().encode(), hashlib.sha256).hexdigest()
    unknown, known = _events(db, "auth.login_failed")
    assert typed.lower() not in unknown.new_json and typed not in unknown.new_json
    assert '"username":"(unknown)"' in unknown.new_json
    assert f'"username_hmac":"{digest}"' in unknown.new_json
    assert unknown.object_id is None
    assert '"username":"erin"' in known.new_json and "username_hmac" not in known.new_json
    with db.session() as s:
        names = set(s.scalars(select(LoginFailure.username)))
    assert "erin" in names and typed.lower() not in names
    assert any(n.startswith("?") and n[1:] == digest[:63] for n in names)
    # A throttled unknown name is not written out either.
    for _ in range(6):
        actions.login(typed, "whatever-password")
    throttled = _events(db, "auth.login_throttled")
    assert throttled and all(typed.lower() not in e.new_json for e in throttled)


def test_a_dedicated_key_for_unknown_names_can_be_configured(app, client, actions, users, db):
    app.config["LOGIN_NAME_KEY"] = "a-dedicated-key-" + "k" * 32
    assert actions.login("nobody", "whatever-password").status_code == 401
    digest = hmac.new(app.config["LOGIN_NAME_KEY"].encode(), b"nobody",
                      hashlib.sha256).hexdigest()
    (event,) = _events(db, "auth.login_failed")
    assert f'"username_hmac":"{digest}"' in event.new_json
