"""Ids the database's integer columns cannot hold, typed into query and form fields or handed
to the services: a missing object (404) or a plain refusal (400), never a server error."""

from __future__ import annotations

import pytest
from sqlalchemy import func, select

from app.store.models import SetpointProposal
from app.web.common import ID_MAX, id_field, parse_id
from app.workflow import NotFound, WorkflowError, accounts, fits, setpoints, studies, uploads
from app.workflow import history as trail
from tests.workflow import helpers as h

HUGE = "99999999999999999999999"
# Each is a whole number that no stored row can have: beyond 64 bits, beyond 2**63 - 1 (the
# largest SQLite integer), one past the largest PostgreSQL INTEGER, and zero.
OUT_OF_RANGE = [HUGE, str(2**63), str(ID_MAX + 1), "0"]


@pytest.fixture
def approved(db, users):
    return h.approved_fit(db)


def _proposals(db) -> int:
    with db.session() as s:
        return s.scalar(select(func.count()).select_from(SetpointProposal))


@pytest.mark.parametrize("raw", OUT_OF_RANGE)
def test_compare_page_with_an_id_out_of_range_is_not_found(actions, approved, raw):
    _study_id, _version_id, fit_id = approved
    actions.login("erin")
    for query in (f"a={raw}&b={fit_id}", f"a={fit_id}&b={raw}"):
        response = actions.client.get(f"/fits/compare?{query}")
        assert response.status_code == 404, query
        assert "No fit" in response.get_data(as_text=True)


@pytest.mark.parametrize("raw", ["abc", "-1", "1.5", "\u0663"])  # U+0663: Arabic-Indic three
def test_compare_page_with_an_id_that_is_no_number_is_a_bad_request(actions, approved, raw):
    _study_id, _version_id, fit_id = approved
    actions.login("erin")
    response = actions.client.get("/fits/compare", query_string={"a": raw, "b": fit_id})
    assert response.status_code == 400
    assert "is not a fit number" in response.get_data(as_text=True)


@pytest.mark.parametrize("raw", OUT_OF_RANGE)
def test_setpoint_form_with_a_fit_id_out_of_range_is_refused(actions, db, approved, raw):
    study_id, _version_id, fit_id = approved
    actions.login("erin")
    # Beside a genuine approved fit, and on its own with a goal of its own.
    for form in ({"fit": [str(fit_id), raw], f"goal_{fit_id}": "maximize"},
                 {"fit": raw, f"goal_{raw}": "maximize"}):
        response = actions.post(f"/studies/{study_id}/setpoints/new", form)
        assert response.status_code == 404, form
        assert "No fit" in response.get_data(as_text=True)
    assert _proposals(db) == 0


def test_setpoint_form_with_a_fit_that_is_no_number_names_the_field(actions, db, approved):
    study_id, _version_id, _fit_id = approved
    actions.login("erin")
    response = actions.post(f"/studies/{study_id}/setpoints/new", {"fit": "twelve"})
    assert response.status_code == 400
    assert "Fit &#39;twelve&#39; is not a fit number." in response.get_data(as_text=True)
    assert _proposals(db) == 0


def test_fit_builder_started_from_an_id_out_of_range_is_not_found(actions, approved):
    _study_id, version_id, fit_id = approved
    actions.login("erin")
    assert actions.client.get(f"/data/{version_id}/fit?from={HUGE}").status_code == 404
    assert actions.client.get(f"/data/{version_id}/fit?from={fit_id}").status_code == 200
    assert actions.client.get(f"/data/{version_id}/fit?from=").status_code == 200


LOOKUPS = {
    "fit": fits.get_fit,
    "study": studies.get_study,
    "data version": uploads.get_data_version,
    "setpoint proposal": setpoints.get_proposal,
    "event": trail.get_event,
}


@pytest.mark.parametrize("what", sorted(LOOKUPS))
def test_lookups_answer_not_found_for_any_id_outside_the_range(db, what):
    lookup = LOOKUPS[what]
    with db.session() as s:
        # ID_MAX itself is a valid id that no row has yet: the query runs and finds nothing.
        for bad in (10**23, 2**63, ID_MAX + 1, ID_MAX, 0, -1):
            with pytest.raises(NotFound, match=f"No {what} ") as caught:
                lookup(s, bad)
            assert caught.value.status == 404


def test_token_revocation_and_live_check_rows_outside_the_range(db, users):
    with db.session() as s:
        erin = h.user(s, "erin")
        for bad in (10**23, ID_MAX + 1):
            with pytest.raises(NotFound, match="No such token"):
                accounts.revoke_token(s, erin, bad)
            assert fits.checked_rows(s, bad) is None


def test_parse_id_reads_whole_numbers_and_refuses_the_rest():
    assert parse_id(" 12 ", "fit", "a") == 12
    assert parse_id("007", "fit", "a") == 7
    assert parse_id(str(ID_MAX), "fit", "a") == ID_MAX
    assert id_field({"a": "  "}, "a", "fit") is None
    assert id_field({}, "a", "fit") is None
    assert id_field({"a": "3"}, "a", "fit") == 3
    for raw in ("", "x1", "+1", "-1", "1e3", "\u00b2", "x" * 5000):  # U+00B2: superscript two
        with pytest.raises(WorkflowError) as refused:
            parse_id(raw, "fit", "a")
        assert refused.value.status == 400 and refused.value.field == "a"
        assert len(refused.value.message) < 60
    # Thousands of digits: no ValueError from int()'s digit limit, just no such fit (and a
    # message that does not repeat them all).
    for raw in (*OUT_OF_RANGE, "9" * 5000, "0" * 5000):
        with pytest.raises(NotFound) as missing:
            parse_id(raw, "fit", "a")
        assert missing.value.field == "a" and len(missing.value.message) < 40
