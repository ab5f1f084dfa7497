"""Predictions at chosen settings over the API, and the profiler page that shows the same numbers.

The cross-check here is within the stored fit but along two independent paths: a prediction at a
run's own settings must equal the fitted value the engine's least-squares solve stored for that
run (the per-run table), which predict() recomputes from the coefficients and coding alone.
Interval arithmetic itself is checked against statsmodels in tests/analysis/test_profiler.py.
"""

from __future__ import annotations

import pytest
from numpy.testing import assert_allclose
from sqlalchemy import func, select

from app.analysis import Thresholds
from app.store.models import AuditEvent, DataVersion, Fit
from app.web.openapi import API_PREFIX
from app.workflow import accounts, fits
from tests.web.test_api import _user, bearer, schema_validator, service_token
from tests.web.test_api import version_id as version_id  # noqa: F401  (a fixture)
from tests.workflow import helpers as h


@pytest.fixture
def fit_id(db, version_id) -> int:  # noqa: F811
    with db.transaction() as s:
        version = s.get(DataVersion, version_id)
        spec = fits.build_spec(version, response="Hardness", model="quadratic",
                               thresholds=Thresholds())
        return fits.create_fit(s, _user(s, "erin"), version, spec).id


def _runs(client, auth, fit_id):
    return client.get(f"{API_PREFIX}/fits/{fit_id}/runs", headers=auth).get_json()["runs"]


def _events(db) -> int:
    with db.session(write=False) as s:
        return s.scalar(select(func.count()).select_from(AuditEvent))


def test_predictions_at_the_runs_equal_their_fitted_values(client, db, fit_id):
    auth = bearer(service_token(db, "erin"))
    runs = [r for r in _runs(client, auth, fit_id) if not r["excluded"]][:6]
    settings = [r["actual"] for r in runs]
    before = _events(db)
    got = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions", headers=auth,
                      json={"settings": settings})
    assert got.status_code == 200, got.get_json()
    body = got.get_json()
    schema_validator(client, auth, "Predictions").validate(body)
    assert body["fit"] == fit_id and body["snapshot_intact"] is True
    assert "Confirmation runs are required" in body["caution"]
    assert_allclose([p["predicted"] for p in body["predictions"]],
                    [r["fitted"] for r in runs], rtol=1e-9)
    # The design's own runs lie in its region; the CI holds the value, the PI holds the CI.
    for p in body["predictions"]:
        assert p["inside_design_region"] is True
        assert p["pi"][0] < p["ci"][0] < p["predicted"] < p["ci"][1] < p["pi"][1]
    assert _events(db) == before  # a question, not a change: nothing is recorded


def test_far_settings_say_they_are_outside_the_design_region(client, db, fit_id):
    auth = bearer(service_token(db, "erin"))
    run = _runs(client, auth, fit_id)[0]["actual"]
    far = {**run, next(iter(run)): 1e4}
    body = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions", headers=auth,
                       json={"settings": [run, far], "level": 0.9}).get_json()
    assert [p["inside_design_region"] for p in body["predictions"]] == [True, False]
    assert body["level"] == 0.9


@pytest.mark.parametrize(("settings", "field"), [
    ([{"Nonsense": 1.0}], "settings[0].Nonsense"),
    ([{}], "settings[0]"),
    ([], "settings"),
])
def test_bad_settings_name_the_field(client, db, fit_id, settings, field):
    auth = bearer(service_token(db, "erin"))
    got = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions", headers=auth,
                      json={"settings": settings})
    assert got.status_code == 400
    assert got.get_json()["field"].startswith(field)


def test_a_missing_factor_is_named(client, db, fit_id):
    auth = bearer(service_token(db, "erin"))
    run = dict(_runs(client, auth, fit_id)[0]["actual"])
    dropped = sorted(run)[0]
    del run[dropped]
    got = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions", headers=auth,
                      json={"settings": [run]})
    assert got.status_code == 400
    assert got.get_json()["field"] == f"settings[0].{dropped}"
    assert dropped in got.get_json()["error"]


def test_a_read_token_may_ask_and_an_outsider_sees_no_fit(client, db, users, fit_id):
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, _user(s, "otto"), "reads",
                                          scope=accounts.READ)
    auth = bearer(raw)
    run = _runs(client, auth, fit_id)[0]["actual"]
    asked = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions", headers=auth,
                        json={"settings": [run]})
    assert asked.status_code == 200
    # A read token still may not change anything.
    refused = client.post(f"{API_PREFIX}/studies", headers=auth, json={"title": "No"})
    assert refused.status_code == 403
    h.add_engineers(db, ("nina", "Nina Outsider"))
    before = _events(db)
    hidden = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions",
                         headers=bearer(service_token(db, "nina")), json={"settings": [run]})
    assert hidden.status_code == 404
    with db.session(write=False) as s:
        refusals = s.scalar(select(func.count()).select_from(AuditEvent)
                            .where(AuditEvent.action == "study.refused"))
    assert refusals == 0 and _events(db) == before + 1  # the token's creation only


def test_a_browser_session_needs_the_form_token(client, actions, db, fit_id):
    actions.login("erin")
    with db.session(write=False) as s:
        run = fits.runs_of(s.get(Fit, fit_id)).records(0, 1)[0]["actual"]
    url = f"{API_PREFIX}/fits/{fit_id}/predictions"
    assert client.post(url, json={"settings": [run]}).status_code == 400
    ok = client.post(url, json={"settings": [run]}, headers={"X-CSRF-Token": actions.csrf()})
    assert ok.status_code == 200


def test_profiler_page_and_its_numbers_agree_with_the_api(client, actions, db, fit_id):
    actions.login("erin")
    page = client.get(f"/fits/{fit_id}/profiler")
    assert page.status_code == 200
    html = page.get_data(as_text=True)
    assert "Confirmation runs are required" in html and 'id="profiler-spec"' in html
    with db.session(write=False) as s:
        run = fits.runs_of(s.get(Fit, fit_id)).records(2, 3)[0]
    numbers = client.get(f"/fits/{fit_id}/profiler.json", query_string=run["actual"]).get_json()
    api = client.post(f"{API_PREFIX}/fits/{fit_id}/predictions",
                      json={"settings": [run["actual"]]},
                      headers={"X-CSRF-Token": actions.csrf()}).get_json()["predictions"][0]
    assert_allclose(numbers["point"]["predicted"], api["predicted"], rtol=1e-12)
    assert_allclose(numbers["point"]["pi"], api["pi"], rtol=1e-12)
    assert_allclose(numbers["point"]["predicted"], run["fitted"], rtol=1e-9)
    # One row per trace point; every trace passes through the chosen value.
    for name, value in run["actual"].items():
        assert any(r["factor"] == name and r["value"] == value for r in numbers["rows"])
    bad = client.get(f"/fits/{fit_id}/profiler.json", query_string={
        next(iter(run["actual"])): "hot"})
    assert bad.status_code == 400 and "must be a number" in bad.get_json()["error"]
