"""Setpoint pages and API (issue 6): the happy path, and every refusal answering 409/403 with
a plain message, through the web form and through the JSON API."""

from __future__ import annotations

import csv
import io
import json
import re

import pytest
from pypdf import PdfReader
from sqlalchemy import func, select, text

from app.analysis.optimize import CAUTION
from app.store.models import AuditEvent, Fit, SetpointProposal
from app.workflow import accounts, fits, setpoints
from tests.conftest import PASSWORD
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h


def bearer(db, username: str) -> dict[str, str]:
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, h.user(s, username), "tests")
    return {"Authorization": f"Bearer {raw}"}


@pytest.fixture
def approved(db, users):
    return h.approved_fit(db)


def form_for(fit_id: int, **extra) -> dict[str, str]:
    data = {"fit": str(fit_id), f"goal_{fit_id}": "maximize", f"spec_lower_{fit_id}": "120"}
    data.update({k: str(v) for k, v in extra.items()})
    return data


def web_propose(actions, study_id: int, fit_id: int, **extra):
    actions.login("erin")
    return actions.post(f"/studies/{study_id}/setpoints/new", form_for(fit_id, **extra))


def api_propose(client, db, fit_id: int, **body):
    payload = {"fits": [fit_id], "goals": {"Hardness": {"goal": "maximize"}}, **body}
    return client.post("/api/v1/setpoints", json=payload, headers=bearer(db, "erin"))


def release_form(db, pid: int, **fields) -> dict[str, str]:
    """The release-for-confirmation form as the page fills it (the offered tolerances)."""
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        offered = setpoints.default_tolerance(s, proposal)
        order = setpoints.factor_order(s, proposal)
    return {"meaning": setpoints.RELEASE, "row_version": "1",
            **{f"tolerance_{j}": str(offered[name]) for j, name in enumerate(order)}, **fields}


def _proposal_count(db) -> int:
    with db.session() as s:
        return s.scalar(select(func.count()).select_from(SetpointProposal))


def test_engineer_proposes_approver_releases_engineer_confirms(db, approved, client, actions):
    study_id, _, fit_id = approved
    actions.login("erin")
    page = client.get(f"/studies/{study_id}/setpoints/new").get_data(as_text=True)
    assert CAUTION in page and f'name="fit" value="{fit_id}"' in page
    response = actions.post(f"/studies/{study_id}/setpoints/new", form_for(fit_id))
    assert response.status_code == 302
    url = response.headers["Location"]
    sheet = client.get(url).get_data(as_text=True)
    for words in (CAUTION, "Predicted responses", "95 % PI", "Overall desirability D",
                  "Stationary point", "maximum", "Eigenvalues", "Not signed yet"):
        assert words in sheet
    pid = int(url.rsplit("/", 1)[1])
    actions.logout()
    actions.login("abel")
    refused = actions.post(f"/setpoints/{pid}/sign", release_form(db, pid, password="wrong"))
    assert refused.status_code == 403 and "password is wrong" in refused.get_data(as_text=True)
    ok = actions.post(f"/setpoints/{pid}/sign", release_form(db, pid, password=PASSWORD))
    assert ok.status_code == 302
    assert "Abel Approver" in client.get(url).get_data(as_text=True)
    actions.logout()
    actions.login("erin")
    with db.session() as s:
        low, high = setpoints.result_of(s.get(SetpointProposal, pid))["optimum"]["pi"]["Hardness"]
    upload = {"file": (io.BytesIO(f"Run,Hardness\nC1,{(low + high) / 2:.2f}\n".encode()),
                       "confirm.csv")}
    done = actions.post(f"/setpoints/{pid}/confirmations", upload,
                        content_type="multipart/form-data")
    assert done.status_code == 302
    final = client.get(url).get_data(as_text=True)
    assert '<span class="verdict pass">pass</span>' in final
    exported = client.get(f"/setpoints/{pid}/export.csv")
    assert exported.headers["Content-Disposition"].startswith("attachment;")
    rows = list(csv.reader(io.StringIO(exported.get_data(as_text=True))))
    assert rows[0] == ["caution", CAUTION]
    doc = json.loads(client.get(f"/setpoints/{pid}/export.json").get_data())
    assert doc["signatures"][0]["printed_name"] == "Abel Approver"
    assert doc["confirmations"][0]["verdict"] == "pass"
    with db.session() as s:
        actions_seen = set(s.scalars(select(AuditEvent.action)))
    assert {"setpoint.propose", "setpoint.release", "setpoint.confirmation",
            "signature.refused"} <= actions_seen


def test_design_space_map_page(db, approved, client, actions):
    study_id, _, fit_id = approved
    url = web_propose(actions, study_id, fit_id).headers["Location"]
    page = client.get(url + "/design-space?x=Cure+temperature&y=Catalyst")
    body = page.get_data(as_text=True)
    assert page.status_code == 200 and CAUTION in body
    spec = json.loads(body.split('id="design-space-spec">', 1)[1].split("</script>", 1)[0])
    layers = spec["layer"]
    assert len(layers) == 3  # grid cells, design runs, the setpoint
    statuses = {d["status"] for d in layers[0]["data"]["values"]}
    assert statuses <= {"PI inside all limits", "PI outside a limit"} and statuses
    same = client.get(url + "/design-space?x=Catalyst&y=Catalyst")
    assert same.status_code == 400 and "two different factors" in same.get_data(as_text=True)


# ---- refusals: each set-up makes the approved fit unusable in one way -------------------------

def _superseded(db, study_id, version_id, fit_id):
    newer = h.make_fit(db, version_id)
    h.submit(db, newer)
    h.sign(db, newer)
    return "superseded"


def _withdrawn(db, study_id, version_id, fit_id):
    h.withdraw(db, fit_id, who="abel", reason="gauge out of calibration")
    return "withdrawn"


def _new_data(db, study_id, version_id, fit_id):
    h.add_version(db, study_id, reason="row 4 typed wrongly")
    return "no longer applies"


def _altered(db, study_id, version_id, fit_id):
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, fit_id).results_json)
        doc["model"]["coefficients"][0] += 3.0
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": json.dumps(doc), "i": fit_id})
    return "is invalid"


def _draft(db, study_id, version_id, fit_id):
    return "not approved"


SETUPS = {"superseded": _superseded, "withdrawn": _withdrawn, "new data version": _new_data,
          "signature invalid": _altered, "not approved": _draft}


@pytest.mark.parametrize("how", list(SETUPS))
@pytest.mark.parametrize("via", ["web", "api"])
def test_unusable_fit_is_refused_with_409(db, approved, client, actions, how, via):
    study_id, version_id, fit_id = approved
    if how == "not approved":
        fit_id = h.make_fit(db, version_id)
    words = SETUPS[how](db, study_id, version_id, fit_id)
    if via == "web":
        response = web_propose(actions, study_id, fit_id)
        message = response.get_data(as_text=True)
    else:
        response = api_propose(client, db, fit_id)
        message = response.get_json()["error"]
        assert response.get_json()["field"] == "fits"
    assert response.status_code == 409
    assert words in message
    assert _proposal_count(db) == 0


@pytest.mark.parametrize("via", ["web", "api"])
def test_request_leaving_the_design_region_is_409(db, approved, client, actions, via):
    study_id, _, fit_id = approved
    if via == "web":
        # bound_high_0: the first factor, Cure temperature (cube 150-170, axial to about 177)
        response = web_propose(actions, study_id, fit_id, bound_high_0=220)
        message = response.get_data(as_text=True)
    else:
        response = api_propose(client, db, fit_id, bounds={"Cure temperature": [150, 220]})
        message = response.get_json()["error"]
        assert response.get_json()["field"] == "Cure temperature"
    assert response.status_code == 409
    assert "leaves the design region" in message and "Cure temperature" in message
    assert _proposal_count(db) == 0


def _draft_proposal(db, fit_id, who="erin") -> int:
    with db.transaction() as s:
        return setpoints.propose(s, h.user(s, who), [fits.get_fit(s, fit_id)],
                                 {"Hardness": {"goal": "maximize"}}, None, None).id


@pytest.fixture
def both_roles(db, users):
    with db.transaction() as s:
        accounts.create_user(s, None, username="bea", full_name="Bea Both",
                             roles="engineer,approver", password=PASSWORD)


@pytest.mark.parametrize("via", ["web", "api"])
def test_author_cannot_release_own_proposal(db, approved, both_roles, client, actions, via):
    h.join(db, approved[0], "bea")
    pid = _draft_proposal(db, approved[2], who="bea")
    if via == "web":
        actions.login("bea")
        response = actions.post(f"/setpoints/{pid}/sign", release_form(db, pid,
                                                                         password=PASSWORD))
        message = response.get_data(as_text=True)
    else:
        response = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=bearer(db, "bea"),
                               json={"meaning": setpoints.RELEASE, "password": PASSWORD})
        message = response.get_json()["error"]
    assert response.status_code == 403
    assert "someone else must sign" in message


@pytest.mark.parametrize("via", ["web", "api"])
def test_wrong_password_is_403_and_recorded(db, approved, client, actions, via):
    pid = _draft_proposal(db, approved[2])
    if via == "web":
        actions.login("abel")
        response = actions.post(f"/setpoints/{pid}/sign", release_form(db, pid,
                                                                         password="guess"))
        message = response.get_data(as_text=True)
    else:
        response = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=bearer(db, "abel"),
                               json={"meaning": setpoints.RELEASE, "password": "guess"})
        message = response.get_json()["error"]
    assert response.status_code == 403 and "password is wrong" in message
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        assert proposal.state == "draft"
        study_id = proposal.study_id
        refused = s.scalars(select(AuditEvent).where(AuditEvent.action == "signature.refused"))
        assert [e.object_type for e in refused] == ["setpoint"]
    # the auditor reads the refusal's cause in the timeline, and the state in the sheets' words
    actions.logout()
    actions.login("otto")
    timeline = client.get(f"/history/studies/{study_id}").get_data(as_text=True)
    assert "refused (wrong password): The password is wrong; nothing was signed." in timeline
    integrity = client.get("/history/integrity").get_data(as_text=True)
    assert '<span class="state draft">proposed</span>' in integrity


@pytest.mark.parametrize("via", ["web", "api"])
def test_confirmation_before_release_is_409(db, approved, client, actions, via):
    pid = _draft_proposal(db, approved[2])
    actions.login("erin")
    response = actions.post(f"/setpoints/{pid}/confirmations",
                            {"file": (io.BytesIO(b"Hardness\n130\n"), "c.csv")},
                            content_type="multipart/form-data")
    assert response.status_code == 409
    assert "only at setpoints released for confirmation" in response.get_data(as_text=True)
    if via == "api":
        # The API has no confirmation upload; its sheet shows none recorded.
        sheet = client.get(f"/api/v1/setpoints/{pid}", headers=bearer(db, "otto")).get_json()
        assert sheet["confirmations"] == [] and sheet["state"] == "draft"


def test_api_round_trip_and_export(db, approved, client):
    created = api_propose(client, db, approved[2], fixed={"Catalyst": 1.0})
    assert created.status_code == 201
    body = created.get_json()
    pid = body["id"]
    assert created.headers["Location"].endswith(f"/api/v1/setpoints/{pid}")
    assert body["caution"] == CAUTION and body["state"] == "draft"
    assert body["optimum"]["settings"]["Catalyst"] == pytest.approx(1.0, abs=1e-9)
    signed = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=bearer(db, "abel"),
                         json={"meaning": setpoints.RELEASE, "password": PASSWORD})
    assert signed.status_code == 201 and signed.get_json()["status"] == "valid"
    again = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=bearer(db, "ada"),
                        json={"meaning": setpoints.RELEASE, "password": PASSWORD})
    assert again.status_code == 409
    assert "only a proposal that is proposed" in again.get_json()["error"]
    reader = bearer(db, "otto")
    sheet = client.get(f"/api/v1/setpoints/{pid}", headers=reader).get_json()
    assert sheet["state"] == "released"
    assert sheet["fits"][0]["id"] == approved[2]
    exported = client.get(f"/api/v1/setpoints/{pid}/export?format=csv", headers=reader)
    assert exported.status_code == 200
    assert "attachment" in exported.headers["Content-Disposition"]
    assert CAUTION in exported.get_data(as_text=True)
    bad = client.get(f"/api/v1/setpoints/{pid}/export?format=pdf", headers=reader)
    assert bad.status_code == 400 and bad.get_json()["field"] == "format"


@pytest.mark.parametrize("payload, field", [
    ({"fits": [], "goals": {}}, "fits"),
    ({"fits": [1], "goals": {"Hardness": {"goal": "best"}}}, "goals.Hardness.goal"),
    ({"fits": [1], "goals": {"Hardness": {"goal": "maximize", "colour": "red"}}},
     "goals.Hardness.colour"),
    ({"fits": [1], "goals": {"Gloss": {"goal": "maximize"}}}, "goals"),
    ({"fits": [1], "goals": {"Hardness": {"goal": "target", "target": 500}}}, "target"),
])
def test_api_bad_requests_name_the_field(db, approved, client, payload, field):
    response = client.post("/api/v1/setpoints", json=payload, headers=bearer(db, "erin"))
    assert response.status_code == 400
    assert response.get_json()["field"] == field
    assert _proposal_count(db) == 0


@pytest.mark.parametrize("goal, field, new_name", [
    ({"goal": "maximize", "low": 120}, "goals.Hardness.low", "'lower'"),
    ({"goal": "maximize", "high": 130}, "goals.Hardness.high", "'upper'"),
    ({"goal": "maximize", "importance": 2}, "goals.Hardness.importance", "'weight'"),
    ({"goal": "in_range", "lower": 120}, "goals.Hardness.goal", "'within'"),
])
def test_api_refuses_the_earlier_goal_words_with_their_new_names(db, approved, client, goal,
                                                                  field, new_name):
    # 'weight' once meant the shape exponent: an old request is refused, never reinterpreted
    response = client.post("/api/v1/setpoints", json={"fits": [approved[2]],
                                                      "goals": {"Hardness": goal}},
                           headers=bearer(db, "erin"))
    assert response.status_code == 400
    body = response.get_json()
    assert body["field"] == field
    assert "no longer accepted" in body["error"] and new_name in body["error"]
    assert _proposal_count(db) == 0


def test_form_and_api_with_the_same_goals_propose_the_same_settings(db, approved, client,
                                                                   actions):
    study_id, version_id, hardness = approved
    gloss = h.make_fit(db, version_id, response="Gloss")
    h.submit(db, gloss)
    h.sign(db, gloss)
    goals = {"Hardness": {"goal": "maximize", "lower": 110, "shape": 2, "weight": 3},
             "Gloss": {"goal": "target", "lower": 80, "target": 86, "upper": 92,
                       "shape": [1, 0.5], "spec": {"lower": 83.0, "upper": None}}}
    form = {"fit": [str(hardness), str(gloss)],
            f"goal_{hardness}": "maximize", f"lower_{hardness}": "110",
            f"shape_{hardness}": "2", f"weight_{hardness}": "3",
            f"goal_{gloss}": "target", f"lower_{gloss}": "80", f"target_{gloss}": "86",
            f"upper_{gloss}": "92", f"shape_{gloss}": "1", f"shape_above_{gloss}": "0.5",
            f"spec_lower_{gloss}": "83", "bound_high_0": "165"}
    actions.login("erin")
    posted = actions.post(f"/studies/{study_id}/setpoints/new", form)
    assert posted.status_code == 302, posted.get_data(as_text=True)
    web_pid = int(posted.headers["Location"].rsplit("/", 1)[1])
    actions.logout()
    created = client.post("/api/v1/setpoints", headers=bearer(db, "erin"), json={
        "fits": [hardness, gloss], "goals": goals,
        "bounds": {"Cure temperature": [None, 165]}})
    assert created.status_code == 201, created.get_json()
    with db.session() as s:
        by_web = s.get(SetpointProposal, web_pid)
        by_api = s.get(SetpointProposal, created.get_json()["id"])
        assert setpoints.goals_of(by_web) == setpoints.goals_of(by_api)
        web_result, api_result = setpoints.result_of(by_web), setpoints.result_of(by_api)
    assert web_result["optimum"]["settings"] == api_result["optimum"]["settings"]
    assert web_result["optimum"]["desirability"] == api_result["optimum"]["desirability"]
    assert web_result["goals"]["Gloss"]["shape"] == [1.0, 0.5]
    assert web_result["goals"]["Hardness"]["weight"] == 3.0


def test_form_keeps_a_response_within_limits(db, approved, client, actions):
    study_id, version_id, hardness = approved
    gloss = h.make_fit(db, version_id, response="Gloss")
    h.submit(db, gloss)
    h.sign(db, gloss)
    actions.login("erin")
    page = client.get(f"/studies/{study_id}/setpoints/new").get_data(as_text=True)
    # one block per response, no grid of goal columns, the new field names
    assert page.count('class="response-goal') == 2 and "<table class=\"goals" not in page
    for name in ("lower", "upper", "target", "shape", "weight"):
        assert f'name="{name}_{gloss}"' in page
    for old in (f'name="low_{gloss}"', f'name="high_{gloss}"', "importance", "in_range",
                "in range", "omposite"):
        assert old not in page
    posted = actions.post(f"/studies/{study_id}/setpoints/new", {
        "fit": [str(hardness), str(gloss)], f"goal_{hardness}": "maximize",
        f"goal_{gloss}": "within", f"lower_{gloss}": "-1000"})
    assert posted.status_code == 302, posted.get_data(as_text=True)
    with db.session() as s:
        proposal = s.get(SetpointProposal, int(posted.headers["Location"].rsplit("/", 1)[1]))
        result = setpoints.result_of(proposal)
    assert result["constraints"]["Gloss"]["met"] is True
    assert "Gloss" not in result["optimum"]["individual_desirability"]
    refused = actions.post(f"/studies/{study_id}/setpoints/new", {
        "fit": [str(hardness), str(gloss)], f"goal_{hardness}": "maximize",
        f"goal_{gloss}": "within", f"lower_{gloss}": "-1000", f"weight_{gloss}": "2"})
    assert refused.status_code == 400
    assert 'data-field="weight"' in refused.get_data(as_text=True)


def test_study_link_snippet_lists_proposals(app, db, approved):
    from flask import g, render_template_string

    from app.workflow import studies

    pid = _draft_proposal(db, approved[2])
    with app.test_request_context("/"):
        with db.session() as s:
            g.user = h.user(s, "erin")
            study = studies.get_study(s, approved[0])
            html = render_template_string('{% include "setpoints/_study_link.html" %}',
                                          study=study)
    assert f"/setpoints/{pid}" in html and "Propose setpoints" in html and "draft" in html


def test_confirmation_file_is_parsed_before_the_write_transaction(db, approved, actions,
                                                                   backend, monkeypatch):
    # Seen: the confirmation file was parsed inside the write transaction; SQLite has one
    # writer, so a slow or large file held every other user's writes while it was read.
    if backend != "sqlite":
        pytest.skip("SQLite's single writer is what parsing inside the write would hold")
    from app.store import audit
    from app.store.db import Database
    from app.workflow import confirmations
    from tests.workflow.test_setpoints import propose, release

    _, _, fit_id = approved
    pid = propose(db, [fit_id])
    release(db, pid)
    # waits 0.2 s for the lock, not 15 s
    other = Database(db.url, busy_timeout_ms=200, keys=db.keys)
    outcomes = []
    real_read = confirmations.read_upload

    def read_while_someone_writes(*args, **kwargs):
        try:
            with other.transaction() as s:
                audit.record(s, actor=None, action="test.concurrent_write", object_type="test")
            outcomes.append("written")
        except Exception as exc:  # "database is locked" if the page holds the write lock
            outcomes.append(f"blocked: {exc}")
        return real_read(*args, **kwargs)

    monkeypatch.setattr(confirmations, "read_upload", read_while_someone_writes)
    actions.login("erin")
    try:
        done = actions.post(f"/setpoints/{pid}/confirmations",
                            {"file": (io.BytesIO(b"Run,Hardness\nC1,130\n"), "confirm.csv")},
                            content_type="multipart/form-data")
    finally:
        other.dispose()
    assert done.status_code == 302
    assert outcomes == ["written"]


def test_the_release_form_keeps_each_tolerance_with_its_factor(db, approved, client, actions):
    from app.workflow import setpoint_signoff

    pid = _draft_proposal(db, approved[2])
    actions.login("abel")
    sheet = client.get(f"/setpoints/{pid}").get_data(as_text=True)
    # The labels in the form, in page order, each followed by its numbered field.
    page_order = re.findall(r"<label>([^<±]+?) ± <input name=\"tolerance_(\d)\"", sheet)
    assert len(page_order) == 3
    chosen = {"Cure temperature": "1.5", "Cure time": "0.25", "Catalyst": "0.02"}
    fields = {f"tolerance_{j}": chosen[name.strip()] for name, j in page_order}
    response = actions.post(f"/setpoints/{pid}/sign", {"meaning": setpoints.RELEASE,
                                                       "password": PASSWORD, **fields})
    assert response.status_code == 302
    with db.session() as s:
        kept = setpoint_signoff.tolerance_of(s, s.get(SetpointProposal, pid))
    assert kept == {name: float(v) for name, v in chosen.items()}


def test_the_api_walks_the_sign_off_with_confirmation_runs(db, approved, client):
    pid = _draft_proposal(db, approved[2])
    approver, engineer = bearer(db, "abel"), bearer(db, "erin")
    released = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=approver,
                           json={"meaning": setpoints.RELEASE, "password": PASSWORD})
    assert released.status_code == 201, released.get_json()
    assert released.get_json()["state_label"] == "released for confirmation"
    early = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=approver,
                        json={"meaning": "confirmed for production", "password": PASSWORD})
    assert early.status_code == 409 and "no confirmation runs" in early.get_json()["error"]
    with db.session() as s:
        low, high = setpoints.result_of(s.get(SetpointProposal, pid))["optimum"]["pi"]["Hardness"]
    wrong = client.post(f"/api/v1/setpoints/{pid}/confirmations", headers=engineer,
                        data={"file": (io.BytesIO(b"Run,Gloss\nC1,80\n"), "runs.csv")},
                        content_type="multipart/form-data")
    assert wrong.status_code == 400 and "Hardness" in wrong.get_json()["error"]
    body = f"Run,Hardness\nC1,{(low + high) / 2:.3f}\nC2,{(low + high) / 2 + 0.1:.3f}\n"
    runs = client.post(f"/api/v1/setpoints/{pid}/confirmations", headers=engineer,
                       data={"file": (io.BytesIO(body.encode()), "runs.csv")},
                       content_type="multipart/form-data")
    assert runs.status_code == 201, runs.get_json()
    assert runs.get_json()["verdict"] == "pass" and runs.get_json()["m"] == 2
    confirmed = client.post(f"/api/v1/setpoints/{pid}/signatures", headers=approver,
                            json={"meaning": "confirmed for production", "password": PASSWORD})
    assert confirmed.status_code == 201
    sheet = client.get(f"/api/v1/setpoints/{pid}", headers=engineer).get_json()
    assert sheet["state"] == "confirmed" and sheet["for_production"] is True
    with db.session() as s:
        refused = s.scalars(select(AuditEvent.action).where(
            AuditEvent.action.in_(["setpoint.confirmation_refused", "signature.refused"]))).all()
    assert sorted(refused) == ["setpoint.confirmation_refused", "signature.refused"]


def test_a_proposal_on_the_region_edge_carries_a_notice(db, approved, client, actions):
    """The demo's hardness is lowest on the sphere of its rotatable design and highest inside
    it: the sheet, its exports and its PDF (read back with pypdf) warn about the edge only for
    the first."""
    study_id, _, fit_id = approved
    for goal, on_edge in (("minimize", True), ("maximize", False)):
        made = web_propose(actions, study_id, fit_id, **{f"goal_{fit_id}": goal})
        url = made.headers["Location"]
        sheet = client.get(url).get_data(as_text=True)
        with db.session() as s:
            edge = setpoints.result_of(s.get(SetpointProposal, int(url.rsplit("/", 1)[1])))[
                "edge"]
        assert (edge is not None) == on_edge, goal
        assert ("On the edge of the region searched." in sheet) == on_edge, goal
        exported = client.get(url + "/export.json").get_json()
        table = client.get(url + "/export.csv").get_data(as_text=True)
        assert exported["edge"] == edge
        assert ("on the edge of the region searched" in table) == on_edge, goal
        if on_edge:
            assert edge["shape"] == "sphere" and "1.682 coded units from the centre" in sheet
            pdf = client.get(url + "/report.pdf")
            assert pdf.status_code == 200
            text = " ".join(re.sub(r"\s+", " ", page.extract_text())
                            for page in PdfReader(io.BytesIO(pdf.data)).pages)
            assert "On the edge of the region searched." in text
            assert "1.682 coded units from the centre" in text
        actions.logout()


def test_the_propose_button_waits_for_an_approved_fit_and_the_form_ticks_the_only_one(
        db, users, client, actions):
    """A study whose only fit is not approved offers no 'Propose setpoints' button; once one
    fit may drive setpoints, the button shows and the form starts with that fit ticked."""
    study_id = h.make_study(db)
    h.make_fit(db, h.add_version(db, study_id), model="quadratic")
    actions.login("erin")
    assert "Propose setpoints</a>" not in client.get(f"/studies/{study_id}").get_data(
        as_text=True)
    study_id, _version, fit_id = h.approved_fit(db)
    assert "Propose setpoints</a>" in client.get(f"/studies/{study_id}").get_data(as_text=True)
    form = client.get(f"/studies/{study_id}/setpoints/new").get_data(as_text=True)
    assert f'<input type="checkbox" name="fit" value="{fit_id}" checked>' in form
