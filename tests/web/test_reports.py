"""PDF downloads: who may fetch them (as for the pages they print), what they carry, the links
on the pages, and the reports in the record package."""

from __future__ import annotations

import io
import zipfile

import pytest

from app.analysis.optimize import CAUTION
from app.web.openapi import API_PREFIX
from app.workflow import fits, reviews
from app.workflow.package import verify_package
from tests.conftest import Actions
from tests.web.test_api import bearer, service_token
from tests.web.test_fits_scale import big_version  # noqa: F401  (a fixture)
from tests.workflow import helpers as h
from tests.workflow.test_report import charts_of, keep, pages_text
from tests.workflow.test_setpoints import GOALS, propose, release


@pytest.fixture
def signed(db, users):
    """erin's study with an approved fit and released setpoints; mia on the team, nina not."""
    h.add_engineers(db, ("mia", "Mia Member"), ("nina", "Nina Outsider"))
    study_id, _version, fit_id = h.approved_fit(db)
    h.join(db, study_id, "mia")
    proposal_id = propose(db, [fit_id], GOALS)
    release(db, proposal_id)
    return {"study": study_id, "fit": fit_id, "setpoint": proposal_id}


def _login(app, username: str) -> Actions:
    actions = Actions(app.test_client())
    assert actions.login(username).status_code == 302
    return actions


def _pdf(response) -> list[str]:
    assert response.status_code == 200, response.data[:300]
    assert response.mimetype == "application/pdf"
    assert response.headers["Content-Disposition"].startswith("attachment")
    assert response.data.startswith(b"%PDF-")
    return pages_text(response.data)


def test_fit_report_for_a_member_with_the_signature(app, signed):
    pages = _pdf(_login(app, "mia").client.get(f"/fits/{signed['fit']}/report.pdf"))
    whole = " ".join(pages)
    assert "Abel Approver" in whole and reviews.APPROVE in whole
    assert f"page 1 of {len(pages)}" in pages[0]
    assert "Mia Member" in whole  # printed for


def test_setpoint_sheet_for_an_auditor_carries_the_caution(app, signed):
    pages = _pdf(_login(app, "otto").client.get(f"/setpoints/{signed['setpoint']}/report.pdf"))
    assert all(CAUTION in text for text in pages)


@pytest.mark.parametrize("kind", ("fits", "setpoints"))
def test_pdfs_are_refused_to_outsiders_and_anonymous(app, signed, kind):
    object_id = signed["fit" if kind == "fits" else "setpoint"]
    path = f"/{kind}/{object_id}/report.pdf"
    assert _login(app, "nina").client.get(path).status_code == 404
    anonymous = app.test_client().get(path)
    assert anonymous.status_code == 302 and "/login" in anonymous.headers["Location"]
    api = app.test_client().get(API_PREFIX + path)
    assert api.status_code == 401 and b"%PDF" not in api.data


def test_api_pdfs_with_a_token(app, db, signed):
    headers = bearer(service_token(db, "erin"))
    client = app.test_client()
    _pdf(client.get(f"{API_PREFIX}/fits/{signed['fit']}/report.pdf", headers=headers))
    pages = _pdf(client.get(f"{API_PREFIX}/setpoints/{signed['setpoint']}/report.pdf",
                            headers=headers))
    assert CAUTION in pages[0]
    outsider = bearer(service_token(db, "nina"))
    refused = client.get(f"{API_PREFIX}/fits/{signed['fit']}/report.pdf", headers=outsider)
    assert refused.status_code == 404 and refused.is_json


def test_pages_link_to_their_pdf(app, signed):
    client = _login(app, "abel").client
    fit, setpoint = signed["fit"], signed["setpoint"]
    for page, link in ((f"/fits/{fit}", f"/fits/{fit}/report.pdf"),
                       (f"/fits/{fit}/review", f"/fits/{fit}/report.pdf"),
                       (f"/setpoints/{setpoint}", f"/setpoints/{setpoint}/report.pdf")):
        body = client.get(page).get_data(as_text=True)
        assert f'href="{link}"' in body, page


def test_record_package_holds_the_reports_and_verifies(app, signed):
    response = _login(app, "otto").client.get(f"/history/studies/{signed['study']}/package.zip")
    assert response.status_code == 200
    data = response.data
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        fit_pdf = zf.read(f"fits/{signed['fit']}/report.pdf")
        sheet = zf.read(f"setpoints/{signed['setpoint']}/report.pdf")
        members = {i.filename: zf.read(i.filename) for i in zf.infolist()}
    assert fit_pdf.startswith(b"%PDF-") and sheet.startswith(b"%PDF-")
    assert CAUTION in pages_text(sheet)[0]
    assert verify_package(data).ok, verify_package(data).problems
    # a report changed inside the package is named
    members[f"fits/{signed['fit']}/report.pdf"] = fit_pdf + b"\n"
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as zf:
        for name, body in members.items():
            zf.writestr(name, body)
    problems = verify_package(buffer.getvalue()).problems
    assert f"fits/{signed['fit']}/report.pdf does not match its SHA-256 in the manifest" in problems


def test_report_of_a_large_fit_draws_the_binned_charts(app, db, big_version):  # noqa: F811
    fit_id = h.make_fit(db, big_version, model="interaction", response="Yield",
                        exclusions={7: "sensor dropout"})
    response = _login(app, "erin").client.get(f"/fits/{fit_id}/report.pdf")
    keep("large-fit.pdf", response.data)
    pages = _pdf(response)
    assert len(pages) <= 40
    whole = " ".join(pages)
    assert "sensor dropout" in whole
    assert "bins" in whole  # the binned charts' notes, as on the page
    with db.session() as s:
        charts = charts_of(fits.get_fit(s, fit_id))
    assert sum("bins" in c.spec.get("datasets", {}) for c in charts) >= 8
    for chart in charts:
        assert chart.title in whole, chart.title
