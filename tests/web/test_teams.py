"""Study teams through the pages and the API: 404 outside the team, the team section, the
members endpoints, and threshold changes on the review page."""

from __future__ import annotations

import io
import json

import pytest
from sqlalchemy import func, select

from app.demo_data import rsm_study
from app.store.models import AuditEvent, DataVersion, Fit, Study, StudyMember
from app.web.openapi import API_PREFIX
from app.workflow import accounts, studies
from tests.conftest import Actions
from tests.workflow import helpers as h

DEMO = rsm_study()
ROLES_JSON = json.dumps({name: role.to_dict() for name, role in DEMO.roles.items()})


@pytest.fixture
def team(db, users):
    """erin's study with a data version and a draft fit; mia on its team; nina not."""
    h.add_engineers(db, ("mia", "Mia Member"), ("nina", "Nina Outsider"))
    study_id = h.make_study(db, title="Erin's cure study")
    h.join(db, study_id, "mia")
    version_id = h.add_version(db, study_id)
    draft = h.make_fit(db, version_id, model="linear")
    return {"study": study_id, "version": version_id, "draft": draft}


def _token(db, username: str) -> dict[str, str]:
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, h.user(s, username), "tests")
    return {"Authorization": f"Bearer {raw}"}


def _login(app, username: str) -> Actions:
    actions = Actions(app.test_client())
    assert actions.login(username).status_code == 302
    return actions


def _counts(db) -> tuple[int, ...]:
    with db.session(write=False) as s:
        return tuple(s.scalar(select(func.count()).select_from(m))
                     for m in (DataVersion, Fit, StudyMember))


def _refusals(db) -> list[dict]:
    with db.session(write=False) as s:
        return [{**json.loads(e.new_json), "study_id": e.study_id, "actor": e.actor_name}
                for e in s.scalars(select(AuditEvent).where(AuditEvent.action == "study.refused")
                                   .order_by(AuditEvent.seq))]


def _upload(client, headers, study_id, reason="corrected"):
    form = {"file": (io.BytesIO(DEMO.csv_bytes), DEMO.filename), "roles": ROLES_JSON,
            "reason": reason}
    return client.post(f"{API_PREFIX}/studies/{study_id}/data", data=form, headers=headers,
                       content_type="multipart/form-data")


# ---- the reported findings ------------------------------------------------------------------

def test_an_outsider_cannot_set_another_owners_thresholds(app, db, team):
    nina = _login(app, "nina")
    response = nina.post(f"/studies/{team['study']}/thresholds",
                         {"review_below": "0.5", "fail_below": "0.4", "reason": "mine now"})
    assert response.status_code == 404
    with db.session(write=False) as s:
        study = s.get(Study, team["study"])
        assert (study.review_below, study.fail_below) == (0.05, 0.01)
    (refusal,) = _refusals(db)
    assert refusal["study_id"] == team["study"] and "(nina)" in refusal["actor"]
    assert refusal["attempted"] == "studies.thresholds" and refusal["cause"] == "not on the team"


def test_an_outsider_cannot_upload_to_another_owners_study(app, db, team):
    before = _counts(db)
    response = _upload(app.test_client(), _token(db, "nina"), team["study"])
    assert response.status_code == 404 and response.get_json()["field"] == "study"
    nina = _login(app, "nina")
    page = nina.post(f"/studies/{team['study']}/upload",
                     {"file": (io.BytesIO(DEMO.csv_bytes), DEMO.filename)},
                     content_type="multipart/form-data")
    assert page.status_code == 404
    assert _counts(db) == before
    assert [r["attempted"] for r in _refusals(db)] == ["api.upload_data", "data.upload"]


def test_an_outsider_cannot_submit_another_owners_draft(app, db, team):
    api = app.test_client().post(f"{API_PREFIX}/fits/{team['draft']}/submit", json={},
                                 headers=_token(db, "nina"))
    assert api.status_code == 404 and api.get_json()["error"] == f"No fit {team['draft']}."
    page = _login(app, "nina").post(f"/fits/{team['draft']}/submit")
    assert page.status_code == 404
    with db.session(write=False) as s:
        assert s.get(Fit, team["draft"]).state == "draft"


def test_a_member_acts_in_the_study(app, db, team):
    auth = _token(db, "mia")
    client = app.test_client()
    submitted = client.post(f"{API_PREFIX}/fits/{team['draft']}/submit", json={}, headers=auth)
    assert submitted.status_code == 200 and submitted.get_json()["state"] == "submitted"
    assert _upload(client, auth, team["study"]).status_code == 201
    assert _refusals(db) == []


def test_a_member_who_is_not_the_owner_cannot_change_thresholds(app, db, team):
    mia = _login(app, "mia")
    page = mia.client.get(f"/studies/{team['study']}").get_data(as_text=True)
    assert "Change check thresholds" not in page and "Upload data" in page
    response = mia.post(f"/studies/{team['study']}/thresholds",
                        {"review_below": "0.5", "fail_below": "0.4", "reason": "looser"},
                        follow_redirects=True)
    assert "Only the owner of study" in response.get_data(as_text=True)
    with db.session(write=False) as s:
        assert s.get(Study, team["study"]).review_below == 0.05
    (refusal,) = _refusals(db)
    assert refusal["cause"] == "not permitted" and refusal["attempted"] == "change thresholds"
    erin = _login(app, "erin")
    assert "Change check thresholds" in erin.client.get(
        f"/studies/{team['study']}").get_data(as_text=True)
    erin.post(f"/studies/{team['study']}/thresholds",
              {"review_below": "0.1", "fail_below": "0.02", "reason": "agreed with QA"})
    with db.session(write=False) as s:
        assert s.get(Study, team["study"]).review_below == 0.1


# ---- reading --------------------------------------------------------------------------------

def test_outsiders_see_neither_the_study_nor_anything_under_it(app, db, team):
    nina = _login(app, "nina").client
    study, version, fit = team["study"], team["version"], team["draft"]
    for url in (f"/studies/{study}", f"/data/{version}", f"/data/{version}/original",
                f"/data/{version}/canonical.csv", f"/fits/{fit}", f"/fits/{fit}/review",
                f"/fits/{fit}/charts.json", f"/fits/{fit}/results.json",
                f"/fits/{fit}/record.json", f"/fits/compare?a={fit}&b={fit}",
                f"/data/{version}/fit", f"/studies/{study}/upload",
                f"/studies/{study}/setpoints/new"):
        assert nina.get(url).status_code == 404, url
    assert "Erin&#39;s cure study" not in nina.get("/studies/").get_data(as_text=True)
    auth = _token(db, "nina")
    client = app.test_client()
    for url in (f"/studies/{study}", f"/studies/{study}/members", f"/data/{version}",
                f"/fits/{fit}"):
        assert client.get(API_PREFIX + url, headers=auth).status_code == 404, url
    assert client.get(f"{API_PREFIX}/studies", headers=auth).get_json() == {"studies": []}


@pytest.mark.parametrize("who", ["abel", "otto", "root", "mia", "erin"])
def test_site_wide_roles_and_the_team_read_the_study(app, db, team, who):
    client = _login(app, who).client
    page = client.get(f"/studies/{team['study']}")
    assert page.status_code == 200 and "Erin&#39;s cure study" in page.get_data(as_text=True)
    assert client.get(f"/fits/{team['draft']}").status_code == 200
    listed = client.get(f"{API_PREFIX}/studies").get_json()["studies"]
    assert [s["id"] for s in listed] == [team["study"]]


# ---- the team section and its forms ----------------------------------------------------------

def test_the_team_section_and_who_may_change_it(app, db, team):
    for who, manages in (("erin", True), ("root", True), ("mia", False), ("abel", False)):
        page = _login(app, who).client.get(f"/studies/{team['study']}").get_data(as_text=True)
        assert '<section id="team">' in page and "Mia Member" in page and "owner" in page
        assert ("Add to the team" in page) is manages, who
    erin = _login(app, "erin")
    added = erin.post(f"/studies/{team['study']}/members", {"username": "nina"},
                      follow_redirects=True)
    assert "nina added to the team" in added.get_data(as_text=True)
    assert _login(app, "nina").client.get(f"/studies/{team['study']}").status_code == 200
    refused = _login(app, "mia").post(f"/studies/{team['study']}/members/nina/remove",
                                      follow_redirects=True)
    assert "Only the owner of study" in refused.get_data(as_text=True)
    root = _login(app, "root")
    root.post(f"/studies/{team['study']}/members/nina/remove")
    assert _login(app, "nina").client.get(f"/studies/{team['study']}").status_code == 404
    with db.session(write=False) as s:
        actions = list(s.scalars(select(AuditEvent.action).where(
            AuditEvent.action.startswith("study.")).order_by(AuditEvent.seq)))
    assert actions == ["study.create", "study.member_add", "study.member_add", "study.refused",
                       "study.member_remove"]


def test_the_team_forms_need_the_form_token(app, db, team):
    erin = _login(app, "erin")
    response = erin.client.post(f"/studies/{team['study']}/members", data={"username": "nina"})
    assert response.status_code == 400
    with db.session(write=False) as s:
        assert s.scalar(select(func.count()).select_from(StudyMember)) == 1


# ---- the members API ------------------------------------------------------------------------

def test_members_api(app, db, team):
    client = app.test_client()
    url = f"{API_PREFIX}/studies/{team['study']}/members"
    listed = client.get(url, headers=_token(db, "otto")).get_json()
    assert listed["study_id"] == team["study"]
    assert [(m["user"]["username"], m["role"]) for m in listed["members"]] == [
        ("erin", "owner"), ("mia", "engineer")]
    assert listed["members"][1]["added_by"]["username"] == "erin"
    erin = _token(db, "erin")
    added = client.post(url, json={"username": "nina", "role": "engineer"}, headers=erin)
    assert added.status_code == 201 and added.headers["Location"].endswith(url)
    assert added.get_json()["user"]["username"] == "nina"
    again = client.post(url, json={"username": "nina"}, headers=erin)
    assert again.status_code == 409 and again.get_json()["field"] == "username"
    for body, field in (({"username": "abel"}, "username"), ({"username": "ghost"}, "username"),
                        ({"username": "nina", "role": "owner"}, "role")):
        refused = client.post(url, json=body, headers=erin)
        assert refused.status_code == 400 and refused.get_json()["field"] == field, body
    assert client.delete(f"{url}/erin", headers=erin).status_code == 400
    assert client.delete(f"{url}/otto", headers=erin).status_code == 404
    not_owner = client.delete(f"{url}/nina", headers=_token(db, "mia"))
    assert not_owner.status_code == 403
    removed = client.delete(f"{url}/nina", headers=_token(db, "root"))
    assert removed.status_code == 200
    assert [m["user"]["username"] for m in removed.get_json()["members"]] == ["erin", "mia"]
    outsider = client.post(url, json={"username": "nina"}, headers=_token(db, "nina"))
    assert outsider.status_code == 404
    assert client.post(url, json={"username": "nina"},
                       headers=_token(db, "abel")).status_code == 403
    causes = [(r["attempted"], r["cause"]) for r in _refusals(db)]
    assert causes == [("remove a team member", "not permitted"),
                      ("api_teams.add_member", "not on the team")]


# ---- the review page ------------------------------------------------------------------------

def test_a_threshold_change_after_submission_shows_on_the_review_page(app, db, team):
    abel = _login(app, "abel").client
    h.submit(db, team["draft"])
    page = abel.get(f"/fits/{team['draft']}/review").get_data(as_text=True)
    assert "Thresholds changed after this fit was submitted" not in page
    with db.transaction() as s:
        studies.set_thresholds(s, h.user(s, "erin"), studies.get_study(s, team["study"]),
                               review_below=0.1, fail_below=0.02, reason="agreed with QA")
    page = abel.get(f"/fits/{team['draft']}/review").get_data(as_text=True)
    assert "Thresholds changed after this fit was submitted" in page
    section = page[page.index('id="threshold-changes"'):]
    section = section[:section.index("</section>")]
    assert "Erin Engineer" in section and "agreed with QA" in section
    assert "review below p = 0.05, fail below p = 0.01" in section
    assert "review below p = 0.1, fail below p = 0.02" in section
