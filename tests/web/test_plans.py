"""Plans over the API and in the pages: build in a study (audited, hashed, sealed), download the
run sheet, upload results against the plan with a deviation flagged, fit, and see the plan on
the review page; access follows the study's team."""

from __future__ import annotations

import csv
import io
import json

import pytest
from openpyxl import load_workbook
from sqlalchemy import func, select

from app.store.models import AuditEvent, DataVersion, Plan, PlanUpload
from app.web.openapi import API_PREFIX
from app.workflow import reviews
from tests.conftest import PASSWORD
from tests.web.test_api import schema_validator
from tests.web.test_setpoints import bearer as _bearer
from tests.workflow import helpers as h

FACTORS = [{"name": "Cure temperature", "low": 150, "high": 170, "units": "°C"},
           {"name": "Cure time", "low": 20, "high": 30, "units": "min"},
           {"name": "Catalyst", "low": 0.8, "high": 1.2, "units": "%"}]
REQUEST = {"design": "central_composite", "axial": "rotatable", "factors": FACTORS,
           "centre_points": 6, "seed": 20261203, "responses": ["Hardness"]}


@pytest.fixture
def study_id(db, users):
    return h.make_study(db)


def _plan(client, auth, study_id, body=REQUEST):
    made = client.post(f"{API_PREFIX}/studies/{study_id}/plans", json=body, headers=auth)
    assert made.status_code == 201, made.get_json()
    return made.get_json()


def _results(sheet_csv: str, *, oven_short_by: float = 0.0) -> bytes:
    """Fill the sheet's Hardness column from a known quadratic; the first run's temperature is
    entered as actually reached, ``oven_short_by`` below the planned setting."""
    rows = list(csv.reader(io.StringIO(sheet_csv)))
    header, body = rows[0], rows[1:]
    t, m, c = (header.index(n) for n in ("Cure temperature [°C]", "Cure time [min]",
                                          "Catalyst [%]"))
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    for i, row in enumerate(body):
        xt, xm, xc = ((float(row[t]) - 160) / 10, (float(row[m]) - 25) / 5,
                      (float(row[c]) - 1.0) / 0.2)
        y = 120 + 6 * xt + 3 * xm + 2 * xc - 4 * xt * xt + 0.3 * ((i * 7) % 5 - 2)
        if i == 0:
            row[t] = f"{float(row[t]) - oven_short_by:.6g}"
        row[-1] = f"{y:.4f}"
        writer.writerow(row)
    return out.getvalue().encode()


def _run_and_upload(client, auth, study_id, **fields):
    """Build the plan, fill its sheet (the oven 2 °C short on the first run) and upload it
    against the plan."""
    plan = _plan(client, auth, study_id)
    sheet = client.get(f"{API_PREFIX}/plans/{plan['id']}/sheet.csv", headers=auth)
    data = _results(sheet.get_data(as_text=True), oven_short_by=2.0)
    return plan, client.post(f"{API_PREFIX}/studies/{study_id}/data", headers=auth,
                             content_type="multipart/form-data",
                             data={"file": (io.BytesIO(data), "runs.csv"),
                                   "plan_id": str(plan["id"]), **fields})


def test_a_plan_is_built_stored_and_audited(client, db, study_id):
    auth = _bearer(db, "erin")
    plan = _plan(client, auth, study_id)
    schema_validator(client, auth, "Plan").validate(plan)
    assert len(plan["runs"]) == 8 + 6 + 6 and plan["seed"] == 20261203
    assert plan["plan_intact"] is True
    assert plan["axial_distance"]["alpha"] == pytest.approx(8 ** 0.25, abs=1e-3)
    assert sorted(r["run_order"] for r in plan["runs"]) == list(range(1, 21))
    assert plan["evaluation"]["model"] == "quadratic"
    with db.session(write=False) as s:
        stored = s.get(Plan, plan["id"])
        events = s.scalars(select(AuditEvent).where(AuditEvent.action == "plan.create")).all()
    assert stored.seal and len(events) == 1
    assert json.loads(events[0].new_json)["sha256"] == plan["sha256"]
    # The same seed gives the same order; another seed another.
    again = _plan(client, auth, study_id)
    other = _plan(client, auth, study_id, {**REQUEST, "seed": 7})

    def order(made):
        return [r["standard_order"] for r in sorted(made["runs"], key=lambda r: r["run_order"])]

    assert order(again) == order(plan) and order(other) != order(plan)
    assert order(plan) != sorted(order(plan))  # not run in standard order


def test_bad_requests_name_the_field_and_store_nothing(client, db, study_id):
    auth = _bearer(db, "erin")
    bad = client.post(f"{API_PREFIX}/studies/{study_id}/plans", headers=auth, json={
        **REQUEST, "factors": [FACTORS[0], {**FACTORS[1], "low": 40}]})
    assert bad.status_code == 400 and bad.get_json()["field"] == "factors[1].low"
    assert client.post(f"{API_PREFIX}/studies/{study_id}/plans", headers=auth, json={
        **REQUEST, "axial": "sideways"}).status_code == 400
    with db.session(write=False) as s:
        assert s.scalar(select(func.count()).select_from(Plan)) == 0


def test_run_sheet_downloads(client, db, study_id):
    auth = _bearer(db, "erin")
    plan = _plan(client, auth, study_id)
    sheet = client.get(f"{API_PREFIX}/plans/{plan['id']}/sheet.csv", headers=auth)
    rows = list(csv.reader(io.StringIO(sheet.get_data(as_text=True))))
    assert rows[0] == ["Run order", "Run label", "Cure temperature [°C]", "Cure time [min]",
                       "Catalyst [%]", "Hardness"]
    assert [int(r[0]) for r in rows[1:]] == list(range(1, 21))
    assert all(r[-1] == "" for r in rows[1:])
    # Settings a plant can set: six significant figures (the axial runs included).
    settings = [float(v) for r in rows[1:] for v in r[2:5]]
    assert all(v == float(f"{v:.6g}") for v in settings)
    assert any(abs(v - 160 + 10 * 8 ** 0.25) < 1e-3 for v in settings)  # an axial run
    book = load_workbook(io.BytesIO(client.get(f"{API_PREFIX}/plans/{plan['id']}/sheet.xlsx",
                                               headers=auth).data))
    cells = list(book.active.values)
    assert list(cells[0]) == rows[0] and len(cells) == 21


def test_results_against_the_plan_flag_the_deviation_and_reach_the_review(client, db,
                                                                          study_id, actions):
    auth = _bearer(db, "erin")
    plan, uploaded = _run_and_upload(client, auth, study_id)
    assert uploaded.status_code == 201, uploaded.get_json()
    version = uploaded.get_json()
    # Roles came from the plan: the factors carry its levels and units.
    assert version["roles"]["Cure temperature [°C]"]["low"] == 150
    got = client.get(f"{API_PREFIX}/data/{version['id']}", headers=auth).get_json()
    deviations = got["plan_deviations"]
    assert deviations["matched_by"] == "run label" and deviations["matched_runs"] == 20
    assert [(d["factor"], d["difference"]) for d in deviations["deviations"]] == [
        ("Cure temperature", pytest.approx(-2.0))]
    assert deviations["missing"] == [] and deviations["extra"] == []
    with db.session(write=False) as s:
        assert s.get(PlanUpload, version["id"]).plan_id == plan["id"]
        event = s.scalars(select(AuditEvent).where(AuditEvent.action == "data.upload")).one()
    assert json.loads(event.new_json)["plan"]["deviations"] == 1
    fitted = client.post(f"{API_PREFIX}/data/{version['id']}/fits", headers=auth,
                         json={"response": "Hardness", "model": "quadratic"})
    assert fitted.status_code == 201
    fit_id = fitted.get_json()["id"]
    actions.login("abel")
    review = actions.client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    assert "randomised from seed 20261203" in review and 'class="deviation"' in review
    # Submitted and signed over the API too: the plan's whole path without a browser.
    assert client.post(f"{API_PREFIX}/fits/{fit_id}/submit", json={},
                       headers=auth).status_code == 200
    signed = client.post(f"{API_PREFIX}/fits/{fit_id}/signatures", headers=_bearer(db, "abel"),
                         json={"meaning": reviews.APPROVE, "password": PASSWORD})
    assert signed.status_code == 201 and signed.get_json()["status"] == "valid"


def test_within_tolerance_and_a_tolerance_of_ones_own(client, db, study_id):
    _plan_made, uploaded = _run_and_upload(client, _bearer(db, "erin"), study_id,
                                           tolerance=json.dumps({"Cure temperature": 2.5}))
    assert uploaded.get_json()["plan_deviations"]["deviations"] == []


def test_an_upload_naming_another_studys_plan_is_refused_and_nothing_stored(client, db,
                                                                            study_id):
    auth = _bearer(db, "erin")
    plan = _plan(client, auth, study_id)
    sheet = client.get(f"{API_PREFIX}/plans/{plan['id']}/sheet.csv", headers=auth)
    other = h.make_study(db, title="Another oven")
    refused = client.post(f"{API_PREFIX}/studies/{other}/data", headers=auth,
                          content_type="multipart/form-data",
                          data={"file": (io.BytesIO(_results(sheet.get_data(as_text=True))),
                                         "runs.csv"), "plan_id": str(plan["id"])})
    assert refused.status_code == 400
    assert refused.get_json()["field"] == "plan_id"
    assert f"Plan {plan['id']} is not a plan of this study" in refused.get_json()["error"]
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(DataVersion)) == 0


def test_plans_follow_the_team(client, db, study_id):
    plan = _plan(client, _bearer(db, "erin"), study_id)
    h.add_engineers(db, ("nina", "Nina Outsider"))
    outsider = _bearer(db, "nina")
    assert client.get(f"{API_PREFIX}/plans/{plan['id']}", headers=outsider).status_code == 404
    assert client.post(f"{API_PREFIX}/studies/{study_id}/plans", json=REQUEST,
                       headers=outsider).status_code == 404
    assert client.get(f"{API_PREFIX}/plans/{plan['id']}",
                      headers=_bearer(db, "otto")).status_code == 200


def test_plan_pages(client, db, study_id, actions):
    actions.login("erin")
    form = {"design": "box_behnken", "seed": "11", "responses": "Hardness",
            **{f"{k}_{i}": str(f[k] if k != "units" else f["units"])
               for i, f in enumerate(FACTORS) for k in ("name", "low", "high", "units")}}
    made = actions.post(f"/studies/{study_id}/plans/new", form)
    assert made.status_code == 302
    page = client.get(made.headers["Location"]).get_data(as_text=True)
    assert "Box–Behnken" in page and "seed <code>11</code>" in page
    assert page.count("<tr>") >= 15  # 12 edge midpoints + 3 centre runs in the sheet
    refused = actions.post(f"/studies/{study_id}/plans/new", {**form, "low_0": "200"})
    assert refused.status_code == 400 and "factors[0]" in refused.get_data(as_text=True)
    study_page = client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert 'id="plans"' in study_page


def test_run_sheet_prints(client, db, study_id, actions):
    from pypdf import PdfReader

    plan = _plan(client, _bearer(db, "erin"), study_id)
    actions.login("erin")
    got = client.get(f"/plans/{plan['id']}/sheet.pdf")
    assert got.status_code == 200 and got.data.startswith(b"%PDF-")
    pages = PdfReader(io.BytesIO(got.data)).pages
    text = "\n".join(p.extract_text() for p in pages)
    assert "RUN SHEET" in text and "seed 20261203" in text and "R20" in text
    assert "Cure temperature [°C]" in text and plan["sha256"][:12] in text


def test_a_plan_crossed_with_suppliers_is_run_uploaded_and_fitted(client, db, study_id):
    """A 2^2 factorial with centre runs at each of two suppliers: the sheet has a Supplier
    column, the upload takes it as a categorical factor from the plan, a wrong supplier on one
    run is listed, and the fit has one row for the supplier in its ANOVA."""
    auth = _bearer(db, "erin")
    body = {"design": "full_factorial", "seed": 9, "responses": ["Hardness"], "factors": [
        FACTORS[0], FACTORS[1], {"name": "Supplier", "levels": ["Birch", "Alder"]}]}
    plan = _plan(client, auth, study_id, body)
    assert len(plan["runs"]) == 2 * (4 + 3)
    rows = list(csv.reader(io.StringIO(client.get(
        f"{API_PREFIX}/plans/{plan['id']}/sheet.csv", headers=auth).get_data(as_text=True))))
    header = rows[0]
    assert header[-2:] == ["Supplier", "Hardness"]
    t, s = header.index("Cure temperature [°C]"), -2
    for i, row in enumerate(rows[1:]):
        shift = 2.0 if row[s] == "Birch" else -2.0
        row[-1] = f"{100 + 3 * (float(row[t]) - 160) / 10 + shift + 0.1 * (i % 3):.3f}"
    rows[1][s] = "Cedar" if rows[1][s] == "Birch" else "Birch"  # the wrong drum was used
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows(rows)
    uploaded = client.post(f"{API_PREFIX}/studies/{study_id}/data", headers=auth,
                           content_type="multipart/form-data",
                           data={"file": (io.BytesIO(out.getvalue().encode()), "runs.csv"),
                                 "plan_id": str(plan["id"])})
    assert uploaded.status_code == 201, uploaded.get_json()
    version = uploaded.get_json()
    assert version["roles"]["Supplier"]["kind"] == "categorical"
    (deviation,) = version["plan_deviations"]["deviations"]
    assert deviation["factor"] == "Supplier" and deviation["row"] == 1
    fitted = client.post(f"{API_PREFIX}/data/{version['id']}/fits", headers=auth,
                         json={"response": "Hardness", "model": "linear"})
    assert fitted.status_code == 201, fitted.get_json()
    anova = [row["source"] for row in fitted.get_json()["results"]["anova"]]
    assert "Supplier" in anova


def test_the_plan_form_takes_a_categorical_factor(client, db, study_id, actions):
    actions.login("erin")
    form = {"design": "full_factorial", "seed": "3", "centre_points": "0",
            "name_0": "Temp", "low_0": "150", "high_0": "170",
            "name_1": "Time", "low_1": "20", "high_1": "30",
            "name_2": "Supplier", "levels_2": "Birch, Alder, Cedar"}
    made = actions.post(f"/studies/{study_id}/plans/new", form)
    assert made.status_code == 302
    page = client.get(made.headers["Location"]).get_data(as_text=True)
    assert "levels: Birch, Alder, Cedar" in page
    assert "Crossed with Supplier (Birch, Alder, Cedar)" in page
    sheet = page.split('id="sheet"')[1]
    assert sheet.count("<tr>") == 1 + 4 * 3  # header + the 2^2 design at each supplier
