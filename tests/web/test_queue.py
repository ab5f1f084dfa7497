"""What waits for whom: the approver's queue with ages and the signing rule applied, the
engineer's "returned to you", on the landing page and through GET /api/v1/reviews."""

from __future__ import annotations

from datetime import timedelta

import pytest

from app.store.base import utcnow
from app.web.openapi import API_PREFIX
from app.workflow import accounts, queue, reviews
from tests.conftest import PASSWORD
from tests.web.test_api import schema_validator
from tests.workflow import helpers as h


@pytest.fixture
def submitted(db, users):
    """Fit 1 submitted by erin (who uploaded its data); fit 2 left a draft."""
    study_id = h.make_study(db)
    version_id = h.add_version(db, study_id)
    first = h.make_fit(db, version_id, model="quadratic")
    h.submit(db, first)
    return first, h.make_fit(db, version_id, model="linear")


def _bearer(db, username):
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, h.user(s, username), "queue")
    return {"Authorization": f"Bearer {raw}"}


@pytest.mark.parametrize(("seconds", "words"), [
    (0, "0 s"), (59, "59 s"), (61, "1 min"), (3_600 + 5 * 60, "1 h 5 min"),
    (2 * 86_400 + 3 * 3_600 + 59, "2 d 3 h"), (-4, "0 s")])
def test_age_words(seconds, words):
    assert queue.age_words(seconds) == words


def test_the_queue_says_who_may_sign_and_how_long_it_waited(db, submitted):
    first, _draft = submitted
    later = utcnow() + timedelta(hours=26)
    with db.session(write=False) as s:
        abel = queue.fits_in_state(s, h.user(s, "abel"), now=later)
        erin = queue.fits_in_state(s, h.user(s, "erin"), now=later)
        otto = queue.fits_in_state(s, h.user(s, "otto"), now=later)
    assert [i["fit"].id for i in abel] == [first]
    assert abel[0]["may_sign"] and abel[0]["why_not"] is None
    assert abel[0]["waiting"].startswith("1 d 2 h")
    # The engineer who submitted it sees it, with the role rule that stops them.
    assert not erin[0]["may_sign"] and erin[0]["why_not"] == "Only approvers sign."
    assert not otto[0]["may_sign"]


def test_an_approver_who_uploaded_the_data_is_told_why_not(db, users):
    """Eve holds both roles (allowed: only admin with approver is barred) and uploaded the
    data that erin's fit uses: the queue shows her the separation rule, not a sign button."""
    with db.transaction() as s:
        accounts.create_user(s, None, username="eve", full_name="Eve Both", password=PASSWORD,
                             roles="engineer,approver")
    study_id = h.make_study(db)
    h.join(db, study_id, "eve")
    fit_id = h.make_fit(db, h.add_version(db, study_id, who="eve"), model="linear")
    h.submit(db, fit_id)
    with db.session(write=False) as s:
        items = queue.fits_in_state(s, h.user(s, "eve"))
    assert [i["fit"].id for i in items] == [fit_id]
    assert not items[0]["may_sign"] and "someone else must sign" in items[0]["why_not"]


def test_landing_page_shows_the_queue_and_what_was_returned(db, actions, client, submitted):
    first, _ = submitted
    actions.login("abel")
    page = client.get("/studies/").get_data(as_text=True)
    assert 'id="queue"' in page and f"Fit {first}: Hardness" in page
    assert "awaiting your review" in page
    h.sign(db, first, meaning=reviews.RETURN, comment="Add the two missing centre runs.")
    page = client.get("/studies/").get_data(as_text=True)
    assert "No fit is waiting for review." in page
    actions.logout()
    actions.login("erin")
    page = client.get("/studies/").get_data(as_text=True)
    assert 'id="returned"' in page and "Add the two missing centre runs." in page
    assert "Abel Approver" in page
    # A new fit of the same response answers the return: it leaves the list.
    with db.session(write=False) as s:
        version_id = s.get(reviews.Fit, first).data_version_id
    h.make_fit(db, version_id, model="quadratic")
    assert 'id="returned"' not in client.get("/studies/").get_data(as_text=True)


def test_reviews_api_lists_the_queue(db, client, submitted):
    first, draft = submitted
    auth = _bearer(db, "abel")
    got = client.get(f"{API_PREFIX}/reviews?state=submitted", headers=auth)
    assert got.status_code == 200
    body = got.get_json()
    schema_validator(client, auth, "ReviewQueue").validate(body)
    assert [f["id"] for f in body["fits"]] == [first]
    assert body["fits"][0]["may_sign"] is True and body["fits"][0]["submitted_by"] == "erin"
    assert body["fits"][0]["waiting_seconds"] >= 0
    drafts = client.get(f"{API_PREFIX}/reviews?state=draft", headers=auth).get_json()
    assert [f["id"] for f in drafts["fits"]] == [draft]
    bad = client.get(f"{API_PREFIX}/reviews?state=pending", headers=auth)
    assert bad.status_code == 400 and bad.get_json()["field"] == "state"


def test_an_outsider_engineer_sees_nothing_of_other_teams(db, client, submitted):
    h.add_engineers(db, ("nina", "Nina Outsider"))
    body = client.get(f"{API_PREFIX}/reviews", headers=_bearer(db, "nina")).get_json()
    assert body["fits"] == []
