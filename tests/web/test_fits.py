"""Fit pages through the Flask client: build, exclusions with reasons, errors, stored snapshot."""

from __future__ import annotations

import hashlib
import io
import json
import re

import pytest
from sqlalchemy import func, select

from app.analysis.boxcox import LAMBDA_RANGE
from app.ingest import read_upload, validate
from app.store.models import AuditEvent, Fit, User
from app.workflow import fits as fit_service
from app.workflow import studies, uploads
from tests.workflow.helpers import add_version, make_study


@pytest.fixture
def version_id(db, users):
    return add_version(db, make_study(db))


def _fit(actions, version_id, **fields):
    data = {"response": "Hardness", "mode": "named", "model": "quadratic", "hierarchy": "on",
            "transform": "none"}
    data.update(fields)
    return actions.post(f"/data/{version_id}/fit", data=data)


FIELDSETS = {"response": "fs-response", "terms": "fs-model", "model": "fs-model",
             "boxcox_lambda": "fs-transform", "reduce_alpha": "fs-reduce",
             "exclusions": "fs-exclusions"}


def _assert_error_beside(page: str, field: str, message: str) -> None:
    """The message sits in the form part the field belongs to, and the summary links there;
    no "(field: …)" text is appended."""
    fieldset = FIELDSETS[field]
    assert "(field:" not in page
    assert f'href="#{fieldset}"' in page
    start = page.index(f'<fieldset id="{fieldset}" class="has-error"')
    part = page[start:page.index("</fieldset>", start)]
    assert f'<p class="field-error" id="{fieldset}-error">' in part
    assert message.replace("'", "&#39;") in part


def _count_fits(db) -> int:
    with db.session() as s:
        return s.scalar(select(func.count()).select_from(Fit))


def test_builder_lists_responses_terms_and_runs(actions, version_id):
    actions.login("erin")
    page = actions.client.get(f"/data/{version_id}/fit").get_data(as_text=True)
    assert '<option value="Hardness"' in page and '<option value="Gloss"' in page
    # The term picker offers squares and interactions with their parents for hierarchy.
    terms = json.loads(re.search(r'id="term-data">(.*?)</script>', page, re.S).group(1))
    by_name = {t["name"]: t for t in terms}
    assert sorted(by_name["Cure temperature:Cure time"]["parents"]) == ["Cure temperature",
                                                                       "Cure time"]
    assert by_name["Catalyst^2"]["parents"] == ["Catalyst"]
    assert page.count('name="exclude"') == 20
    assert 'aria-label="Reason for leaving out row 7"' in page


def test_data_page_links_to_the_builder(actions, version_id):
    actions.login("erin")
    page = actions.client.get(f"/data/{version_id}").get_data(as_text=True)
    assert f'href="/data/{version_id}/fit"' in page


def test_engineer_fits_quadratic_with_an_exclusion(actions, db, version_id):
    actions.login("erin")
    response = _fit(actions, version_id, exclude="3", reason_3="panel scratched in the oven")
    assert response.status_code == 302
    fit_id = int(response.headers["Location"].rsplit("/", 1)[1])
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert "panel scratched in the oven" in page
    assert "Runs left out of this fit (1)" in page
    # Every check appears in the verdict panel with its verdict and a link to its chart.
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        results = fit_service.results_of(fit)
        sha = fit.snapshot_sha256
        assert json.loads(fit.spec_json)["exclusions"] == [[3, "panel scratched in the oven"]]
    for check in results["checks"]:
        assert f'data-check="{check["id"]}"' in page
        assert check["message"].replace("'", "&#39;") in page
    assert 'href="#chart-normal_probability"' in page
    assert 'id="chart-residuals_vs_factor:Cure-temperature"' in page
    assert sha in page
    assert "Lack of fit" in page and "Pure error" in page
    assert "Type III" in page
    assert results["equation"]["actual"].replace("'", "&#39;") in page


def test_exclusion_without_reason_is_refused_and_names_the_field(actions, db, version_id):
    actions.login("erin")
    response = _fit(actions, version_id, exclude="5", reason_5="   ")
    assert response.status_code == 400
    page = response.get_data(as_text=True)
    assert "Excluding row 5 needs a written reason." in page
    _assert_error_beside(page, "exclusions", "Excluding row 5 needs a written reason.")
    # The builder comes back with the choice kept, and nothing was stored.
    assert re.search(r'name="exclude" value="5"[^>]*checked', page)
    assert _count_fits(db) == 0


@pytest.mark.parametrize("fields, message, field", [
    ({"response": "Nope"}, "'Nope' is not a response", "response"),
    ({"mode": "terms"}, "Pick at least one term", "terms"),
    ({"mode": "terms", "terms": ["Cure temperature", "Cure speed"]}, "'Cure speed' is not a "
     "factor name", "model"),
    ({"transform": "boxcox", "boxcox_lambda": "half"}, "Box–Cox λ must be a number",
     "boxcox_lambda"),
    ({"reduce": "on", "reduce_alpha": "2"}, "Reduction α must be between 0 and 1",
     "reduce_alpha"),
    ({"exclude": "99", "reason_99": "typo"}, "Excluded row 99 does not exist", "exclusions"),
])
def test_bad_choices_re_render_the_builder_naming_the_field(actions, db, version_id, fields,
                                                            message, field):
    actions.login("erin")
    response = _fit(actions, version_id, **fields)
    assert response.status_code == 400
    page = response.get_data(as_text=True)
    assert message.replace("'", "&#39;") in page
    _assert_error_beside(page, field, message)
    assert _count_fits(db) == 0


@pytest.mark.parametrize("typed", ["700", "1e308", "-800", "3.01", "nan", "inf", "-1e400"])
def test_box_cox_lambda_outside_the_search_range_is_refused(actions, db, version_id, typed):
    actions.login("erin")
    response = _fit(actions, version_id, transform="boxcox", boxcox_lambda=typed)
    assert response.status_code == 400
    page = response.get_data(as_text=True)
    low, high = LAMBDA_RANGE
    assert f"Box–Cox λ must lie between {low:g} and {high:g}" in page
    _assert_error_beside(page, "boxcox_lambda", "Box–Cox λ must lie between")
    assert f'value="{typed}"' in page
    assert _count_fits(db) == 0


def test_box_cox_lambda_at_the_ends_of_the_range_is_fitted(actions, db, version_id):
    actions.login("erin")
    for typed in ("-3", "3"):
        response = _fit(actions, version_id, transform="boxcox", boxcox_lambda=typed)
        assert response.status_code == 302, response.get_data(as_text=True)
    assert _count_fits(db) == 2


def test_term_picker_keeps_parents_with_hierarchy(actions, db, version_id):
    actions.login("erin")
    response = _fit(actions, version_id, mode="terms", terms=["Cure temperature:Cure time"])
    assert response.status_code == 302
    with db.session() as s:
        results = fit_service.results_of(s.scalar(select(Fit)))
    assert results["terms"] == ["Cure temperature", "Cure time", "Cure temperature:Cure time"]


def test_snapshot_is_served_from_storage(actions, db, version_id, monkeypatch):
    actions.login("erin")
    fit_id = int(_fit(actions, version_id).headers["Location"].rsplit("/", 1)[1])

    def refuse(*_args, **_kwargs):
        raise AssertionError("the stored snapshot must not be recomputed")

    monkeypatch.setattr(fit_service, "run_analysis", refuse)
    monkeypatch.setattr("app.analysis.analyse", refuse)
    monkeypatch.setattr("app.analysis.engine.analyse", refuse)
    assert actions.client.get(f"/fits/{fit_id}").status_code == 200
    assert actions.client.get(f"/fits/{fit_id}/charts.json").status_code == 200
    download = actions.client.get(f"/fits/{fit_id}/results.json")
    assert download.status_code == 200
    # An ASCII name is a token, so werkzeug writes it unquoted (RFC 6266 allows either).
    assert download.headers["Content-Disposition"] == (
        f"attachment; filename=fit-{fit_id}-results.json")
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        # Byte for byte what was stored (and hashed) at creation.
        assert download.get_data(as_text=True) == fit.results_json
        assert download.headers["X-Snapshot-SHA256"] == fit.snapshot_sha256
        assert hashlib.sha256(fit_service.canonical_json(
            fit_service.snapshot_document(fit)).encode()).hexdigest() == fit.snapshot_sha256


def test_running_again_makes_a_new_fit_and_audits_it(actions, db, version_id):
    actions.login("erin")
    first = _fit(actions, version_id, model="linear").headers["Location"]
    second = _fit(actions, version_id, model="quadratic").headers["Location"]
    assert first != second
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(AuditEvent)
                        .where(AuditEvent.action == "fit.create")) == 2


def test_charts_json_has_every_chart_named_like_the_checks(actions, db, version_id):
    actions.login("erin")
    fit_id = int(_fit(actions, version_id).headers["Location"].rsplit("/", 1)[1])
    body = actions.client.get(f"/fits/{fit_id}/charts.json").get_json()
    names = [c["name"] for c in body["charts"]]
    with db.session() as s:
        results = fit_service.results_of(s.get(Fit, fit_id))
    for check in results["checks"]:
        if check["id"] != "curvature":  # not applicable to a central composite design
            assert check["chart"] in names
    assert "contour" in names and "boxcox_profile" in names
    contour = next(c for c in body["charts"] if c["name"] == "contour")
    # By default the first two factors of the fit; a query picks the pair.
    first = results["factors"][0]["name"]
    assert contour["spec"]["layer"][0]["encoding"]["x"]["title"] == first
    pair = actions.client.get(f"/fits/{fit_id}/charts.json?x=Cure+time&y=Catalyst").get_json()
    contour = next(c for c in pair["charts"] if c["name"] == "contour")
    assert contour["spec"]["layer"][0]["encoding"]["x"]["title"] == "Cure time"
    assert contour["spec"]["layer"][0]["encoding"]["y"]["title"] == "Catalyst"
    bad = actions.client.get(f"/fits/{fit_id}/charts.json?x=Catalyst&y=Catalyst")
    assert bad.status_code == 400


def test_compare_two_fits(actions, db, version_id):
    actions.login("erin")
    a = int(_fit(actions, version_id, model="linear").headers["Location"].rsplit("/", 1)[1])
    b = int(_fit(actions, version_id, exclude="3", reason_3="scratched").headers["Location"]
            .rsplit("/", 1)[1])
    actions.logout()
    actions.login("abel")  # approvers read fits too
    page = actions.client.get(f"/fits/compare?a={a}&b={b}").get_data(as_text=True)
    assert f"Fit {a} beside fit {b}" in page
    assert "Cure temperature^2" in page and "not in model" in page
    assert "scratched" in page
    with db.session() as s:
        cmp = fit_service.compare(s.get(Fit, a), s.get(Fit, b))
    r2 = next(x for x in cmp["statistics"] if x["key"] == "r_squared")
    assert r2["a"] < r2["b"]  # the quadratic explains more of this curved response
    square = next(t for t in cmp["terms"] if t["term"] == "Catalyst^2")
    assert square["a"] is None and square["b"] is not None
    assert cmp["excluded"] == [{"row": 3, "label": "CV40-R03", "a": None, "b": "scratched"}]
    assert actions.client.get("/fits/compare?a=1").status_code == 400


def test_builder_and_create_are_for_engineers_only(actions, db, version_id):
    actions.login("abel")
    assert actions.client.get(f"/data/{version_id}/fit").status_code == 403
    assert _fit(actions, version_id).status_code == 403
    assert _count_fits(db) == 0


def test_change_and_fit_again_prefills_the_builder(actions, version_id):
    actions.login("erin")
    fit_id = int(_fit(actions, version_id, exclude="4", reason_4="oven door opened")
                 .headers["Location"].rsplit("/", 1)[1])
    page = actions.client.get(f"/data/{version_id}/fit?from={fit_id}").get_data(as_text=True)
    assert 'value="oven door opened"' in page
    assert re.search(r'name="exclude" value="4"[^>]*checked', page)


def test_saturated_two_level_fit_shows_the_half_normal_plot(actions, db, users):
    from app.demo_data import screening_study

    demo = screening_study()
    with db.transaction() as s:
        erin = s.scalar(select(User).where(User.username == "erin"))
        study = studies.create_study(s, erin, title="Spray screening")
        raw = read_upload(demo.csv_bytes, demo.filename)
        v = uploads.add_data_version(s, erin, study, data=demo.csv_bytes, filename=demo.filename,
                                     raw=raw, table=validate(raw, demo.roles))
        vid = v.id
    actions.login("erin")
    response = _fit(actions, vid, response="Film thickness", model="interaction")
    fit_id = int(response.headers["Location"].rsplit("/", 1)[1])
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert 'data-chart="half_normal"' in page and "Lenth: PSE" in page
    # No residual degrees of freedom: the residual charts are not drawn, the checks say why.
    assert 'data-chart="normal_probability"' not in page
    assert "the model is saturated" in page
    # A 2^(5-1) fraction: its generator and which effects share a column (each two-factor
    # interaction with one three-factor interaction, e.g. AB = CDE; Box, Hunter & Hunter ch. 6).
    assert 'id="aliases"' in page and "2^(5-1) fraction in 16 distinct runs, resolution 5" in page
    assert re.search(r"<td>[^<:]+:[^<:]+</td><td>[^<:]+:[^<:]+:[^<:]+</td>", page)


def test_several_responses_in_one_request_and_the_study_overview(actions, db, users, client):
    """One model form fitted to each response in one step: one fit each (each its own event),
    all or none; the study page then shows each response's latest fit and its verdicts."""
    from tests.web.test_setpoints import bearer

    study_id = make_study(db)
    version_id = add_version(db, study_id)
    auth = bearer(db, "erin")
    made = client.post(f"/api/v1/data/{version_id}/fits", headers=auth,
                       json={"responses": ["Hardness", "Gloss"], "model": "quadratic"})
    assert made.status_code == 201, made.get_json()
    group = made.get_json()["fits"]
    assert [f["response"] for f in group] == ["Hardness", "Gloss"]
    assert all(f["results"]["spec"]["model"] == "quadratic" for f in group)
    with db.session(write=False) as s:
        events = s.scalars(select(AuditEvent).where(AuditEvent.action == "fit.create")).all()
    assert len(events) == 2
    # A response that does not exist refuses the whole request: nothing is stored.
    refused = client.post(f"/api/v1/data/{version_id}/fits", headers=auth,
                          json={"responses": ["Hardness", "Shine"], "model": "linear"})
    assert refused.status_code == 400
    with db.session(write=False) as s:
        assert s.scalar(select(func.count()).select_from(Fit)) == 2
    both = client.post(f"/api/v1/data/{version_id}/fits", headers=auth,
                       json={"response": "Hardness", "responses": ["Gloss"]})
    assert both.status_code == 400
    actions.login("erin")
    page = client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert 'id="overview"' in page
    for fit in group:
        assert f"Fit {fit['id']}</a> (data v1)" in page


def test_the_builder_fits_the_same_model_to_ticked_responses(actions, db, users, client):
    study_id = make_study(db)
    version_id = add_version(db, study_id)
    actions.login("erin")
    made = _fit(actions, version_id, response="Hardness", model="linear", also="Gloss")
    assert made.status_code == 302
    with db.session(write=False) as s:
        stored = [(f.id, f.response, json.loads(f.spec_json)["model"])
                  for f in s.scalars(select(Fit).order_by(Fit.id))]
    assert [row[1:] for row in stored] == [("Hardness", "linear"), ("Gloss", "linear")]
    assert made.headers["Location"].endswith(f"/fits/{stored[0][0]}")


def test_a_run_without_a_response_is_kept_and_left_out_with_a_reason(actions, db, users, client):
    """Upload with a gap in one response: the run stays; a fit of that response is refused
    until the run is left out with a reason; the other response fits with every run."""
    from app.demo_data import rsm_study
    from tests.web.test_setpoints import bearer

    demo = rsm_study()
    lines = demo.csv_bytes.decode().splitlines()
    header = lines[0].split(",")
    cells = lines[3].split(",")
    cells[header.index("Hardness")] = ""
    lines[3] = ",".join(cells)
    data = ("\n".join(lines) + "\n").encode()
    study_id = make_study(db)
    auth = bearer(db, "erin")
    roles = json.dumps({n: r.to_dict() for n, r in demo.roles.items()})
    stored = client.post(f"/api/v1/studies/{study_id}/data", headers=auth,
                         content_type="multipart/form-data",
                         data={"file": (io.BytesIO(data), "gap.csv"), "roles": roles})
    assert stored.status_code == 201, stored.get_json()
    version_id = stored.get_json()["id"]
    refused = client.post(f"/api/v1/data/{version_id}/fits", headers=auth,
                          json={"response": "Hardness", "model": "quadratic"})
    assert refused.status_code == 400
    assert "no value in row 3: leave that run out" in refused.get_json()["error"]
    fitted = client.post(f"/api/v1/data/{version_id}/fits", headers=auth, json={
        "response": "Hardness", "model": "quadratic",
        "exclusions": [{"row": 3, "reason": "panel lost before measuring"}]})
    assert fitted.status_code == 201
    gloss = client.post(f"/api/v1/data/{version_id}/fits", headers=auth,
                        json={"response": "Gloss", "model": "quadratic"})
    assert gloss.get_json()["results"]["fit"]["n"] == len(lines) - 1
    actions.login("erin")
    page = client.get(f"/fits/{fitted.get_json()['id']}")
    assert page.status_code == 200 and "panel lost before measuring" in page.get_data(
        as_text=True)
    charts = client.get(f"/fits/{fitted.get_json()['id']}/charts.json")
    assert charts.status_code == 200
    # Strict JSON (no NaN) for the browser's parser, whatever the left-out run lacks.
    json.loads(charts.get_data(as_text=True),
               parse_constant=lambda c: pytest.fail(f"{c} in the chart JSON"))


def test_same_factor_on_both_contour_axes_is_a_clear_400_on_the_fit_page(actions, version_id):
    actions.login("erin")
    fit_id = int(_fit(actions, version_id).headers["Location"].rsplit("/", 1)[1])
    response = actions.client.get(f"/fits/{fit_id}?x=Catalyst&y=Catalyst")
    assert response.status_code == 400
    page = response.get_data(as_text=True)
    assert 'id="contour-error"' in page and "“Catalyst” was chosen for both axes" in page
    # the rest of the fit page is there, with the default contour
    assert f"Fit {fit_id}" in page and 'data-chart="contour"' in page
    assert 'name="y" aria-invalid="true"' in page
    unknown = actions.client.get(f"/fits/{fit_id}?x=Catalyst&y=Nope")
    assert unknown.status_code == 400 and "must be factors of this fit" in unknown.get_data(
        as_text=True)
    # and a good pair afterwards is not served the error from a cache
    good = actions.client.get(f"/fits/{fit_id}?x=Cure+time&y=Catalyst")
    assert good.status_code == 200 and "contour-error" not in good.get_data(as_text=True)


def test_reduction_steps_read_to_four_figures_and_the_header_names_the_reduced_model(
        actions, db, version_id):
    import re

    actions.login("erin")
    fit_id = int(_fit(actions, version_id, reduce="on", reduce_alpha="0.05")
                 .headers["Location"].rsplit("/", 1)[1])
    with db.session() as s:
        results = fit_service.results_of(s.get(Fit, fit_id))
    assert results["reduction"], "the demo quadratic should lose a term at 0.05"
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    step = results["reduction"][0]
    assert f"Removed <strong>{step['term']}</strong>: p value {step['p_value']:.4g}" in page
    assert not re.search(r"\d\.\d{6,}", page.split("Model reduction steps", 1)[1]
                         .split("</section>", 1)[0]), "raw floats in the reduction steps"
    summary = page.split('class="summary-line">', 1)[1].split("</p>", 1)[0]
    assert "reduced from quadratic" in summary
    assert f"{len(results['terms'])} terms: " + ", ".join(results["terms"]) in summary
