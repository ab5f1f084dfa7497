"""Signing rules through the pages and the API: the lockout shared by signing and the account
page's password change, audited refusals, admin unlock, and the rules shown where one signs."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select

from app.store.models import AuditEvent, Fit
from app.workflow import accounts, reviews, signing
from tests.conftest import PASSWORD
from tests.workflow import helpers as h

NEW_PASSWORD = "a brand new pass phrase"  # noqa: S105  (test accounts only)


@pytest.fixture
def fit_id(db, users):
    fit = h.make_fit(db, h.add_version(db, h.make_study(db)), model="linear")
    h.submit(db, fit)
    return fit


def _bearer(db, username):
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, h.user(s, username), "tests")
    return {"Authorization": f"Bearer {raw}"}


def _events(db, action):
    with db.session() as s:
        return [json.loads(e.new_json) for e in s.scalars(
            select(AuditEvent).where(AuditEvent.action == action).order_by(AuditEvent.seq))]


def _state(db, fit_id):
    with db.session() as s:
        return s.get(Fit, fit_id).state


def _change_password(actions, current, new=NEW_PASSWORD, confirm=None):
    return actions.post("/account/password", {"current_password": current,
                                              "new_password": new,
                                              "confirm_password": new if confirm is None
                                              else confirm})


def test_api_locks_signing_after_five_wrong_passwords(db, client, actions, fit_id):
    # Seen: 30 wrong signing passwords over the API were answered 403, then the right one signed.
    headers = _bearer(db, "abel")
    url = f"/api/v1/fits/{fit_id}/signatures"
    for _ in range(5):
        wrong = client.post(url, json={"meaning": reviews.APPROVE, "password": "guess"},
                            headers=headers)
        assert wrong.status_code == 403 and "password is wrong" in wrong.json["error"]
    right = client.post(url, json={"meaning": reviews.APPROVE, "password": PASSWORD},
                        headers=headers)
    assert right.status_code == 403 and "locked" in right.json["error"]
    assert _state(db, fit_id) == "submitted"
    causes = [e["cause"] for e in _events(db, "signature.refused")]
    assert causes == [signing.WRONG_PASSWORD] * 5 + [signing.LOCKED]
    assert len(_events(db, "user.reauth_locked")) == 1
    # The same lock holds the account page's password change, and that refusal is audited.
    actions.login("abel")
    response = _change_password(actions, PASSWORD)
    assert response.status_code == 302
    assert "locked" in actions.client.get("/account/").get_data(as_text=True)
    assert [e["cause"] for e in _events(db, "user.password_change_refused")] == [signing.LOCKED]
    actions.logout()
    # An admin unlocks from the users page; then the right password signs.
    actions.login("root")
    users_page = actions.client.get("/admin/users").get_data(as_text=True)
    assert "signing locked until" in users_page
    assert actions.post("/admin/users/abel/unlock").status_code == 302
    assert len(_events(db, "user.unlock")) == 1
    signed = client.post(url, json={"meaning": reviews.APPROVE, "password": PASSWORD},
                         headers=headers)
    assert signed.status_code == 201, signed.json
    assert signed.json["printed_name"] == "Abel Approver" and signed.json["signer"] == "abel"


def test_account_page_failures_count_and_are_audited(db, actions, users):
    # Seen: 15 wrong current passwords on the account page: no throttle and no audit event.
    actions.login("erin")
    mismatch = _change_password(actions, PASSWORD, confirm="something else entirely")
    assert mismatch.status_code == 302
    _change_password(actions, PASSWORD, new="short")
    for _ in range(5):
        _change_password(actions, "not my password")
    page = actions.client.get("/account/").get_data(as_text=True)
    assert "current password is wrong" in page
    _change_password(actions, PASSWORD)
    refused = _events(db, "user.password_change_refused")
    assert [e["cause"] for e in refused] == ([signing.BAD_INPUT] * 2
                                             + [signing.WRONG_PASSWORD] * 5 + [signing.LOCKED])
    assert [e.get("consecutive_failures") for e in refused[2:7]] == [1, 2, 3, 4, 5]
    assert actions.login("erin", NEW_PASSWORD).status_code == 401  # nothing was changed


def test_password_change_success_resets_the_count(db, actions, users):
    actions.login("erin")
    for _ in range(4):
        _change_password(actions, "not my password")
    assert _change_password(actions, PASSWORD).headers["Location"].endswith("/login")
    with db.session() as s:
        assert h.user(s, "erin").reauth_failures == 0
    assert actions.login("erin", NEW_PASSWORD).status_code == 302


def test_self_approval_on_the_page_is_403_audited_and_the_rules_are_shown(db, actions, users):
    with db.transaction() as s:
        accounts.create_user(s, None, username="una", full_name="Una Both",
                             roles="engineer,approver", password=PASSWORD)
    study_id = h.make_study(db)
    h.join(db, study_id, "una")
    fit = h.make_fit(db, h.add_version(db, study_id, who="una"), model="linear")
    h.submit(db, fit)
    actions.login("una")
    page = actions.client.get(f"/fits/{fit}/review").get_data(as_text=True)
    for rule in signing.SEPARATION_OF_DUTIES:
        assert rule in page.replace("&#39;", "'")
    assert "You uploaded data version 1, which this fit uses" in page
    response = actions.post(f"/fits/{fit}/sign", {"meaning": reviews.APPROVE,
                                                  "password": PASSWORD})
    assert response.status_code == 403 and "uploaded data version 1" in response.get_data(
        as_text=True)
    assert [e["cause"] for e in _events(db, "signature.refused")] == [signing.DUTIES]
    actions.logout()
    h.sign(db, fit, who="abel")
    actions.login("otto")
    page = actions.client.get(f"/fits/{fit}/review").get_data(as_text=True)
    assert 'Abel Approver <span class="muted">(abel)</span>' in page


def test_admin_cannot_grant_themself_a_role_through_the_page(db, actions, users):
    actions.login("root")
    response = actions.post("/admin/users/root/roles", {"roles": ["admin", "engineer"]})
    assert response.status_code == 302
    assert "own roles" in actions.client.get("/admin/users").get_data(as_text=True)
    with db.session() as s:
        assert h.user(s, "root").roles == "admin"
    actions.post("/admin/users", {"username": "max", "full_name": "Abel approver",
                                  "roles": ["engineer"], "password": NEW_PASSWORD})
    actions.post("/admin/users/abel/roles", {"roles": ["approver", "admin"]})
    refused = _events(db, "user.change_refused")
    assert [(e["attempted"], e["cause"]) for e in refused] == [
        ("set roles", signing.DUTIES), ("add user", signing.DUTIES), ("set roles", signing.DUTIES)]
