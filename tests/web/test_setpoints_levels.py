"""Setpoints with a categorical factor through the form and the API: a fixed level is kept, a
level the factor does not have is refused naming the factor, and the sheet and its exports
carry the levels compared. The search is checked in tests/analysis/optimize/test_levels.py."""

from __future__ import annotations

import io
import re

import pytest
from pypdf import PdfReader

from app.analysis.optimize import CAUTION
from app.workflow import fits
from tests.web.test_setpoints import bearer
from tests.workflow import helpers as h


@pytest.fixture
def approved(db, users):
    return h.approved_categorical_fit(db)


def test_form_fixes_a_level_and_the_sheet_lists_it(db, approved, client, actions):
    study_id, fit_id = approved
    actions.login("erin")
    form = client.get(f"/studies/{study_id}/setpoints/new").get_data(as_text=True)
    assert 'aria-label="Fixed level of Machine"' in form and "any level" in form
    made = actions.post(f"/studies/{study_id}/setpoints/new",
                        {"fit": str(fit_id), f"goal_{fit_id}": "maximize", "fixed_0": "M2",
                         f"spec_lower_{fit_id}": "80"})
    assert made.status_code == 302
    sheet = client.get(made.headers["Location"]).get_data(as_text=True)
    assert CAUTION in sheet and "Levels compared" in sheet
    assert "Machine held at M2, as asked: no other level was searched." in sheet
    settings = re.search(r'<table class="settings">.*?</table>', sheet, re.S).group(0)
    machine = re.search(r'<th scope="row">Machine</th>.*?</tr>', settings, re.S).group(0)
    assert '<td class="num">level</td><td>fixed</td>' in machine
    table = client.get(made.headers["Location"] + "/export.csv").get_data(as_text=True)
    assert "Machine,M2,,,M2,M2,fixed" in table
    pdf = client.get(made.headers["Location"] + "/report.pdf")
    text = " ".join(page.extract_text() for page in PdfReader(io.BytesIO(pdf.data)).pages)
    assert "level, fixed" in re.sub(r"\s+", " ", text)
    # one continuous factor: the map page says why there is no map instead of failing
    space = client.get(made.headers["Location"] + "/design-space")
    assert space.status_code == 200
    assert "these fits have one (Speed), so there is no map" in space.get_data(as_text=True)

    refused = actions.post(f"/studies/{study_id}/setpoints/new",
                           {"fit": str(fit_id), f"goal_{fit_id}": "maximize", "fixed_0": "M9"})
    body = refused.get_data(as_text=True)
    assert refused.status_code == 400
    assert "must be one of M2, M1, M3, not &#39;M9&#39;" in body
    assert 'data-field="Machine"' in body


def test_api_takes_a_level_name_and_answers_the_levels(db, approved, client):
    _, fit_id = approved
    headers = bearer(db, "erin")
    bad = client.post("/api/v1/setpoints", headers=headers,
                      json={"fits": [fit_id], "goals": {"Gloss": {"goal": "maximize"}},
                            "fixed": {"Machine": "M9"}})
    assert bad.status_code == 400 and bad.get_json()["field"] == "Machine"
    bounded = client.post("/api/v1/setpoints", headers=headers,
                          json={"fits": [fit_id], "goals": {"Gloss": {"goal": "maximize"}},
                                "bounds": {"Machine": [1, 2]}})
    assert bounded.status_code == 400 and "categorical" in bounded.get_json()["error"]
    made = client.post("/api/v1/setpoints", headers=headers,
                       json={"fits": [fit_id], "goals": {"Gloss": {"goal": "maximize"}}})
    assert made.status_code == 201
    sheet = client.get(made.headers["Location"], headers=headers).get_json()
    assert sheet["optimum"]["settings"]["Machine"] == "M1"
    assert sheet["levels"]["chosen"] == {"Machine": "M1"}
    assert [i["levels"]["Machine"] for i in sheet["levels"]["by_level"]] == ["M2", "M1", "M3"]
    with db.session() as s:
        doc = fits.results_of(fits.get_fit(s, fit_id))
    best = max(i["predicted"]["Gloss"] for i in sheet["levels"]["by_level"])
    assert sheet["optimum"]["predicted"]["Gloss"] == pytest.approx(best, rel=1e-9)
    assert doc["model"]["factors"][0]["levels"] == ["M2", "M1", "M3"]
