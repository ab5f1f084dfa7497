"""Sign-off through the pages and the JSON API."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select

from app.store.models import AuditEvent, Fit
from app.workflow import accounts, reviews
from tests.conftest import PASSWORD
from tests.workflow import helpers as h


@pytest.fixture
def fit_id(db, users):
    study_id = h.make_study(db)
    return h.make_fit(db, h.add_version(db, study_id), model="quadratic",
                      exclusions={3: "panel scratched before measurement"})


def _state(db, fit_id):
    with db.session() as s:
        return s.get(Fit, fit_id).state


def _token(db, username):
    with db.transaction() as s:
        _tok, raw = accounts.create_token(s, None, h.user(s, username), "test")
    return raw


def test_engineer_submits_and_approver_signs_through_the_pages(db, actions, client, fit_id):
    actions.login("erin")
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    assert "Submit for review" in page and "Audit chain head #" in page
    response = actions.post(f"/fits/{fit_id}/submit", {"row_version": "1"})
    assert response.status_code == 302 and _state(db, fit_id) == "submitted"
    actions.logout()
    actions.login("abel")
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    # Everything the approver needs: verdicts, exclusions with reasons, checks that could not
    # run and why, the thresholds, the fit's history.
    assert 'class="verdict review"' in page or 'class="verdict pass"' in page
    assert "panel scratched before measurement" in page
    assert "Checks that could not run" in page and "curvature" in page
    assert "review below p = 0.05, fail below p = 0.01" in page
    assert "fit.submit" in page and "fit.create" in page
    response = actions.post(f"/fits/{fit_id}/sign", {"meaning": reviews.APPROVE,
                                                     "password": PASSWORD,
                                                     "comment": "Adequate.",
                                                     "row_version": "2"})
    assert response.status_code == 302 and _state(db, fit_id) == "approved"
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    assert "Abel Approver" in page and reviews.APPROVE in page and "UTC" in page
    assert 'signature-status valid' in page


def test_wrong_password_on_the_page_is_403_and_audited(db, actions, fit_id):
    h.submit(db, fit_id)
    actions.login("abel")
    response = actions.post(f"/fits/{fit_id}/sign", {"meaning": reviews.APPROVE,
                                                     "password": "guess", "row_version": "2"})
    assert response.status_code == 403
    assert "password is wrong" in response.get_data(as_text=True)
    assert _state(db, fit_id) == "submitted"
    with db.session() as s:
        event = s.scalar(select(AuditEvent).where(AuditEvent.action == "signature.refused"))
        assert event.object_id == str(fit_id) and "Abel Approver" in event.actor_name


def test_out_of_order_step_on_the_page_is_409_with_a_message(db, actions, fit_id):
    actions.login("abel")
    response = actions.post(f"/fits/{fit_id}/sign", {"meaning": reviews.APPROVE,
                                                     "password": PASSWORD})
    assert response.status_code == 409
    assert "must be submitted" in response.get_data(as_text=True)


def test_review_page_shows_differences_from_the_previous_approval(db, actions, client, users):
    study_id, version_id, first = h.approved_fit(db, model="linear")
    second = h.make_fit(db, version_id, model="interaction",
                        exclusions={5: "thermocouple fault logged"})
    h.submit(db, second)
    actions.login("abel")
    page = client.get(f"/fits/{second}/review").get_data(as_text=True)
    assert f"Compared with <a href=\"/fits/{first}/review\">fit {first}</a>" in page
    assert "Cure temperature:Cure time" in page  # a term added
    assert "row 5 (thermocouple fault logged)" in page


def test_api_submit_and_sign(db, client, fit_id):
    engineer, approver = _token(db, "erin"), _token(db, "abel")
    response = client.post(f"/api/v1/fits/{fit_id}/submit", json={},
                           headers={"Authorization": f"Bearer {engineer}"})
    assert response.status_code == 200 and response.json["state"] == "submitted"
    again = client.post(f"/api/v1/fits/{fit_id}/submit", json={},
                        headers={"Authorization": f"Bearer {engineer}"})
    assert again.status_code == 409 and "must be draft" in again.json["error"]
    bad = client.post(f"/api/v1/fits/{fit_id}/signatures", json={"password": PASSWORD},
                      headers={"Authorization": f"Bearer {approver}"})
    assert bad.status_code == 400 and bad.json["field"] == "meaning"
    wrong = client.post(f"/api/v1/fits/{fit_id}/signatures",
                        json={"meaning": reviews.APPROVE, "password": "nope"},
                        headers={"Authorization": f"Bearer {approver}"})
    assert wrong.status_code == 403 and wrong.json["field"] == "password"
    signed = client.post(f"/api/v1/fits/{fit_id}/signatures",
                         json={"meaning": reviews.APPROVE, "password": PASSWORD,
                               "comment": "Adequate for setpoints."},
                         headers={"Authorization": f"Bearer {approver}"})
    assert signed.status_code == 201, signed.json
    body = signed.json
    assert body["printed_name"] == "Abel Approver" and body["status"] == "valid"
    assert body["signed_at"].endswith("Z") and body["meaning"] == reviews.APPROVE
    assert signed.headers["Location"].endswith(f"/api/v1/fits/{fit_id}")
    fit = client.get(f"/api/v1/fits/{fit_id}", headers={"Authorization": f"Bearer {approver}"})
    assert [s["manifest_sha256"] for s in fit.json["signatures"]] == [body["manifest_sha256"]]
    with db.session() as s:
        actions = [e.action for e in s.scalars(select(AuditEvent).order_by(AuditEvent.seq))]
    assert actions.count("signature.refused") == 1 and actions.count("fit.approve") == 1


def test_api_refuses_own_fit_with_403(db, client, users):
    fit_id = h.own_submitted_fit(db)
    token = _token(db, "bo")
    response = client.post(f"/api/v1/fits/{fit_id}/signatures",
                           json={"meaning": reviews.APPROVE, "password": PASSWORD},
                           headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 403 and response.json["field"] == "signer"
    assert json.loads(response.get_data())["error"].startswith("You made or submitted")


def test_signoff_endpoints_are_documented(app):
    from app.web.openapi import build_document

    paths = build_document("test")["paths"]
    assert "post" in paths["/fits/{fit_id}/submit"]
    operation = paths["/fits/{fit_id}/signatures"]["post"]
    assert operation["x-access"] == ["approver"] and "409" in operation["responses"]


def test_fit_record_export_carries_signatures_and_chain_head(db, client, actions, users):
    from tests.workflow.helpers import approved_fit

    _study, _version, fit_id = approved_fit(db)
    actions.login("otto")
    response = client.get(f"/fits/{fit_id}/record.json")
    assert response.status_code == 200
    assert response.headers["Content-Disposition"].startswith("attachment;")
    import json as _json

    record = _json.loads(response.get_data(as_text=True))
    assert record["snapshot_intact"] is True
    (signature,) = record["signatures"]
    assert signature["printed_name"] == "Abel Approver"
    assert signature["meaning"] == "approved for setpoint use"
    assert signature["signed_at"] and signature["status"] == "valid"
    assert record["chain_head"]["seq"] > 0 and len(record["chain_head"]["hash"]) == 64


def test_review_page_states_the_adjustment_and_what_a_pass_is_worth(db, actions, client, users):
    # the demo data are a 20-run rotatable central composite design: make calibrate simulated
    # that design with the quadratic model, so the approver sees its line
    fit = h.make_fit(db, h.add_version(db, h.make_study(db)), model="quadratic")
    actions.login("abel")
    page = client.get(f"/fits/{fit}/review").get_data(as_text=True)
    assert "Westfall-Young step-down min-P" in page and "p adjusted" in page
    assert "What a pass is worth in this design" in page
    assert "Simulated for central composite, 3 factors, 20 runs" in page
    assert "AR(1) ρ = 0.6 in run order" in page


def _section(page: str, marker: str) -> str:
    start = page.index(marker)
    return page[start:page.index("</section>", start)]


def test_wrong_password_shows_beside_the_sign_form(db, actions, fit_id):
    h.submit(db, fit_id)
    actions.login("abel")
    response = actions.post(f"/fits/{fit_id}/sign", {"meaning": reviews.APPROVE,
                                                     "password": "guess", "row_version": "2"})
    page = response.get_data(as_text=True)
    sign = _section(page, 'id="sign"')
    assert 'id="sign-error"' in sign and "password is wrong" in sign
    assert 'aria-describedby="sign-error"' in sign
    # said once, beside the form, not at the top of the page
    assert page.count("password is wrong") == 1


def test_author_who_is_also_an_approver_is_told_why_instead_of_offered_the_form(
        db, client, actions, users):
    fit_id = h.own_submitted_fit(db)
    actions.login("bo")
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    sign = _section(page, 'id="sign"')
    assert 'id="sign-barred"' in sign and "You made or submitted this fit" in sign
    assert f'action="/fits/{fit_id}/sign"' not in page
    actions.logout()
    actions.login("abel")
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    assert f'action="/fits/{fit_id}/sign"' in page and "sign-barred" not in page


def test_review_page_leads_with_the_question_and_lists_left_out_runs_with_their_settings(
        db, actions, client, fit_id):
    actions.login("abel")
    page = client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    checks = page.split('<table class="checks">', 1)[1].split("</table>", 1)[0]
    assert ('<td>Do residuals look normal?<br><small class="muted check-id">normality</small>'
            in checks)
    left = page.split('<table class="excluded-runs">', 1)[1].split("</table>", 1)[0]
    # row 3 of the demo file: CV40-R03 at 150 °C, 30 min, 0.8 %, hardness 116.5
    cells = [c.split(">", 1)[1] for c in left.split("<td")[1:]]
    cells = [c.split("</td>", 1)[0] for c in cells]
    assert cells == ["CV40-R03", "3", "3", "150", "30", "0.8", "116.5",
                     "panel scratched before measurement"]
