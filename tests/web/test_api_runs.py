"""A fit's runs through the API: pages with a next link, every run as CSV, a small document."""

from __future__ import annotations

import csv
import io
import math

import pytest

from tests.web import test_api
from tests.web.test_api import API_PREFIX, bearer, schema_validator, service_token

version_id = test_api.version_id  # the same fixture: the demo data stored through the services


@pytest.fixture
def fit(client, db, version_id):
    auth = bearer(service_token(db, "erin"))
    made = client.post(f"{API_PREFIX}/data/{version_id}/fits", headers=auth, json={
        "response": "Hardness", "model": "quadratic",
        "exclusions": [{"row": 4, "reason": "=HYPERLINK(\"x\") typed as a reason"}]})
    assert made.status_code == 201, made.get_json()
    return made.get_json(), auth


def test_pages_walk_the_whole_table_by_their_next_links(client, fit):
    body, auth = fit
    assert body["runs"]["n"] == 20 and body["runs"]["excluded"] == 1
    seen, url = [], f"{body['runs']['runs']}?limit=7"
    while url:
        page = client.get(url, headers=auth)
        assert page.status_code == 200
        data = page.get_json()
        assert not list(schema_validator(client, auth, "RunPage").iter_errors(data))
        assert data["total"] == 20 and data["limit"] == 7
        seen += data["runs"]
        url = data["next"]
    assert [r["row"] for r in seen] == list(range(1, 21))
    whole = client.get(f"{body['runs']['runs']}?limit=20", headers=auth).get_json()["runs"]
    assert seen == whole
    assert [r["row"] for r in whole if r["excluded"]] == [4]


@pytest.mark.parametrize("query, field", [("limit=0", "limit"), ("limit=10001", "limit"),
                                          ("offset=-1", "offset"), ("limit=ten", "limit")])
def test_bad_paging_names_the_field(client, fit, query, field):
    body, auth = fit
    answer = client.get(f"{body['runs']['runs']}?{query}", headers=auth)
    assert answer.status_code == 400 and answer.get_json()["field"] == field


def test_offset_past_the_end_is_an_empty_last_page(client, fit):
    body, auth = fit
    data = client.get(f"{body['runs']['runs']}?offset=500", headers=auth).get_json()
    assert data["runs"] == [] and data["next"] is None


def test_csv_holds_every_run_in_full_precision_and_neutralises_formulas(client, fit):
    body, auth = fit
    answer = client.get(body["runs"]["runs_csv"], headers=auth)
    assert answer.status_code == 200 and answer.mimetype == "text/csv"
    assert answer.headers["X-Snapshot-SHA256"] == body["snapshot_sha256"]
    rows = list(csv.DictReader(io.StringIO(answer.get_data(as_text=True))))
    page = client.get(f"{body['runs']['runs']}?limit=20", headers=auth).get_json()["runs"]
    assert len(rows) == len(page) == 20
    for line, run in zip(rows, page, strict=True):
        assert int(line["row"]) == run["row"]
        for name in ("fitted", "residual", "leverage", "cooks_distance"):
            value = run[name]
            assert (line[name] == "" and value is None) or float(line[name]) == value, name
        assert float(line["actual:Cure time"]) == run["actual"]["Cure time"]
        assert line["flags"].split() == run["flags"]
    reason = next(r for r in rows if r["row"] == "4")["exclusion_reason"]
    assert reason.startswith("'=HYPERLINK")
    assert all(math.isfinite(float(r["observed"])) for r in rows)
