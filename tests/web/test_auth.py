"""Sign-in, sessions, deny-by-default and CSRF."""

from __future__ import annotations

import shutil
from datetime import timedelta

import pytest
from sqlalchemy import func, select, update

from app import create_app
from app.store.base import utcnow
from app.store.db import database
from app.store.models import AuditEvent, LoginFailure, UserSession
from app.workflow import accounts
from tests.conftest import PASSWORD, TEST_ARGON2, Actions


def test_login_page_renders_and_unknown_user_is_refused(client, actions, users, db):
    assert client.get("/login").status_code == 200
    response = actions.login("nobody", "whatever-password")
    assert response.status_code == 401
    assert "User name or password is wrong." in response.get_data(as_text=True)
    with db.session() as s:
        failed = s.scalars(select(AuditEvent).where(AuditEvent.action == "auth.login_failed")).all()
    # A name that matches no account is kept only as a keyed hash (test_login_throttle.py).
    assert len(failed) == 1 and '"username":"(unknown)"' in failed[0].new_json
    assert "nobody" not in failed[0].new_json


def test_login_logout_revokes_the_server_side_session(client, actions, users, db):
    assert actions.login("erin").status_code == 302
    assert client.get("/studies/").status_code == 200
    cookie = client.get_cookie("plumbline")
    assert actions.logout().status_code == 302
    # Replaying the old cookie must not work: the server-side record is revoked.
    client.set_cookie("plumbline", cookie.value)
    response = client.get("/studies/")
    assert response.status_code == 302 and "/login" in response.headers["Location"]
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(UserSession)
                        .where(UserSession.revoked_at.is_not(None))) == 1


def test_wrong_password_is_logged_and_right_one_works(client, actions, users, db):
    assert actions.login("erin", "not the password").status_code == 401
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(LoginFailure)) == 1
    assert actions.login("erin").status_code == 302


def test_deactivation_ends_a_live_session_at_once(client, actions, users, db):
    actions.login("erin")
    assert client.get("/studies/").status_code == 200
    with db.transaction() as s:
        accounts.set_active(s, None, "erin", False)
    assert client.get("/studies/").status_code == 302


def test_idle_and_absolute_timeouts(client, actions, users, db, app):
    actions.login("erin")
    with db.transaction() as s:
        s.execute(update(UserSession).values(last_seen_at=utcnow() - timedelta(minutes=31)))
    assert client.get("/studies/").status_code == 302
    actions.login("erin")
    with db.transaction() as s:
        s.execute(update(UserSession).where(UserSession.revoked_at.is_(None)).values(
            created_at=utcnow() - timedelta(hours=12, minutes=1), last_seen_at=utcnow()))
    assert client.get("/studies/").status_code == 302


def test_post_without_csrf_token_is_refused(client, actions, users):
    actions.login("erin")
    response = client.post("/studies/new", data={"title": "No token"})
    assert response.status_code == 400
    assert "security token" in response.get_data(as_text=True)


def test_login_throttle_slows_repeated_failures(client, actions, users):
    for _ in range(5):
        assert actions.login("erin", "wrong password 1").status_code == 401
    # The sixth failure starts a delay; even the right password waits.
    assert actions.login("erin", "wrong password 1").status_code == 401
    response = actions.login("erin", PASSWORD)
    assert response.status_code == 429
    assert "Try again in" in response.get_data(as_text=True)


def test_open_redirect_after_login_is_refused(client, actions, users):
    response = client.post("/login", data={"username": "erin", "password": PASSWORD,
                                           "next": "//evil.example/", "csrf_token": actions.csrf()})
    assert response.status_code == 302
    assert response.headers["Location"] == "/studies/"


def test_roles_are_enforced(client, actions, users):
    actions.login("otto")  # auditor
    assert client.get("/studies/new").status_code == 403
    assert client.get("/admin/users").status_code == 403
    actions.logout()
    actions.login("root")
    assert client.get("/admin/users").status_code == 200


def test_security_headers(client):
    response = client.get("/login")
    csp = response.headers["Content-Security-Policy"]
    assert "object-src 'none'" in csp and "frame-ancestors 'none'" in csp
    assert "unsafe-eval" not in csp
    assert response.headers["X-Content-Type-Options"] == "nosniff"
    assert response.headers["Referrer-Policy"] == "same-origin"


def test_session_cookie_flags(client, actions, users):
    response = actions.login("erin")
    cookie = response.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie


def test_argon2id_parameters_meet_asvs_floor(users, db):
    with db.session() as s:
        from app.store.models import User

        stored = s.scalar(select(User.password_hash).where(User.username == "erin"))
    assert stored.startswith("$argon2id$")
    params = dict(p.split("=") for p in stored.split("$")[3].split(","))
    assert int(params["m"]) >= 19456 and int(params["t"]) >= 2


def test_one_time_password_must_be_changed_first(client, actions, db):
    with db.transaction() as s:
        accounts.create_user(s, None, username="newbie", full_name="New Person",
                             roles="engineer", password="given by the admin 1", one_time=True)
    assert actions.login("newbie", "given by the admin 1").status_code == 302
    response = client.get("/studies/")
    assert response.status_code == 302 and response.headers["Location"].endswith("/account/")
    changed = actions.post("/account/password", {"current_password": "given by the admin 1",
                                                 "new_password": "my own new pass phrase",
                                                 "confirm_password": "my own new pass phrase"})
    assert changed.status_code == 302
    assert actions.login("newbie", "my own new pass phrase").status_code == 302
    assert client.get("/studies/").status_code == 200


@pytest.mark.parametrize("behind_proxy", [True, False])
def test_client_address_through_a_proxy_reaches_the_audit_trail(behind_proxy, tmp_path,
                                                                 sqlite_template):
    """ProxyFix is applied by create_app itself, so any WSGI server (gunicorn included) gets it;
    without the setting a forged X-Forwarded-For header is ignored."""
    path = tmp_path / "proxy.db"
    shutil.copy(sqlite_template, path)
    application = create_app({
        "TESTING": True, "DATABASE_URL": f"sqlite:///{path}", "SECRET_KEY": "test-only-" + "p" * 40,
        "SOFTWARE_VERSION": "test", "BEHIND_PROXY": behind_proxy, **TEST_ARGON2,
    })
    db = database(application)
    with db.transaction() as s:
        accounts.create_user(s, None, username="erin", full_name="Erin Engineer",
                             roles="engineer", password=PASSWORD)
    client = application.test_client()
    actions = Actions(client)
    response = client.post("/login", data={"username": "erin", "password": PASSWORD,
                                           "csrf_token": actions.csrf()},
                           headers={"X-Forwarded-For": "203.0.113.7"})
    assert response.status_code == 302
    with db.session() as s:
        event = s.scalars(select(AuditEvent).where(AuditEvent.action == "auth.login")).one()
    expected = "203.0.113.7" if behind_proxy else "127.0.0.1"
    assert f'"remote_addr":"{expected}"' in event.new_json
    db.dispose()
