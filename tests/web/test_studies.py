"""Studies: create, list, view, thresholds with their audit events."""

from __future__ import annotations

import json

from sqlalchemy import select

from app.store.models import AuditEvent, Study


def test_create_list_view(client, actions, users, db):
    actions.login("erin")
    response = actions.post("/studies/new", {"title": "Dryer study",
                                              "purpose": "Find the dew point",
                                              "process": "Line 4 dryer"})
    assert response.status_code == 302
    assert "Dryer study" in client.get("/studies/").get_data(as_text=True)
    page = client.get(response.headers["Location"]).get_data(as_text=True)
    assert "review below p = 0.05, fail below p = 0.01" in page
    with db.session() as s:
        event = s.scalar(select(AuditEvent).where(AuditEvent.action == "study.create"))
        assert json.loads(event.new_json)["title"] == "Dryer study"


def test_missing_title_and_bad_thresholds_name_the_field(client, actions, users, db):
    actions.login("erin")
    missing = actions.post("/studies/new", {"title": "  "})
    assert missing.status_code == 400 and "title is required" in missing.get_data(as_text=True)
    swapped = actions.post("/studies/new", {"title": "T", "review_below": "0.01",
                                             "fail_below": "0.05"})
    assert swapped.status_code == 400
    assert "fail below &lt; review below" in swapped.get_data(as_text=True)
    words = actions.post("/studies/new", {"title": "T", "review_below": "five"})
    assert words.status_code == 400
    assert "Review below must be a number" in words.get_data(as_text=True)
    with db.session() as s:
        assert s.scalar(select(Study.id)) is None


def test_threshold_change_needs_a_reason_and_is_audited(client, actions, users, db):
    actions.login("erin")
    location = actions.post("/studies/new", {"title": "T"}).headers["Location"]
    study_id = int(location.rsplit("/", 1)[1])
    actions.post(f"/studies/{study_id}/thresholds", {"review_below": "0.1", "fail_below": "0.02"})
    with db.session() as s:
        assert s.get(Study, study_id).review_below == 0.05
    actions.post(f"/studies/{study_id}/thresholds", {"review_below": "0.1", "fail_below": "0.02",
                                                     "reason": "site SOP QA-114 rev 3"})
    with db.session() as s:
        assert s.get(Study, study_id).review_below == 0.1
        event = s.scalar(select(AuditEvent).where(AuditEvent.action == "study.set_thresholds"))
        assert json.loads(event.old_json) == {"review_below": 0.05, "fail_below": 0.01}
        assert event.reason == "site SOP QA-114 rev 3"
