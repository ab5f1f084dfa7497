"""A new data version shows what changed from the previous one: page, CSV and API."""

from __future__ import annotations

import csv
import io

import pandas as pd
import pytest

from app.demo_data import rsm_study
from app.ingest import read_upload, validate
from app.workflow import studies, uploads
from tests.workflow import helpers as h

DEMO = rsm_study()


def _store(db, study_id: int, frame: pd.DataFrame, roles=None, reason="Corrected") -> int:
    data = frame.to_csv(index=False).encode("utf-8")
    with db.transaction() as s:
        raw = read_upload(data, "cure.csv")
        return uploads.add_data_version(s, h.user(s, "erin"), studies.get_study(s, study_id),
                                        data=data, filename="cure.csv", raw=raw,
                                        table=validate(raw, roles or DEMO.roles),
                                        reason=reason).id


@pytest.fixture
def versions(db, users):
    """Three versions: v2 changes one hardness, drops R05 and adds R99; v3 renames Gloss."""
    study_id = h.make_study(db)
    before = pd.read_csv(io.BytesIO(DEMO.csv_bytes))
    first = _store(db, study_id, before, reason=None)
    after = before.copy()
    after.loc[6, "Hardness"] = 126.0
    after = after.drop(index=[4])
    after = pd.concat([after, before.iloc[[0]].assign(**{"Panel ID": "CV40-R99", "Run order": 99})])
    second = _store(db, study_id, after)
    renamed = after.rename(columns={"Gloss": "Gloss 60"})
    roles = {("Gloss 60" if k == "Gloss" else k): v for k, v in DEMO.roles.items()}
    third = _store(db, study_id, renamed, roles)
    return first, second, third


def test_version_page_lists_the_differences_from_the_previous_version(client, actions,
                                                                       versions):
    first, second, _ = versions
    actions.login("erin")
    page = client.get(f"/data/{second}").get_data(as_text=True)
    assert "Differences from version 1" in page
    assert "Runs matched by run label" in page
    assert "1 cell changed in 1 run" in page and "1 run added, 1 removed" in page
    assert "CV40-R07" in page and "125.1" in page and "126.0" in page
    assert "Runs added: CV40-R99" in page and "Runs removed: CV40-R05" in page
    assert "Differences from" not in client.get(f"/data/{first}").get_data(as_text=True)


def test_renamed_column_shows_as_removed_added_and_likely_renamed(client, actions, versions):
    actions.login("erin")
    page = client.get(f"/data/{versions[2]}").get_data(as_text=True)
    assert "Column added: “Gloss 60”" in page and "Column removed: “Gloss”" in page
    assert "appears renamed to “Gloss 60”" in page


def test_csv_holds_every_difference(client, actions, versions):
    actions.login("erin")
    response = client.get(f"/data/{versions[1]}/differences.csv")
    assert response.status_code == 200
    rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert [(r["change"], r["run"], r["column"], r["old"], r["new"]) for r in rows] == [
        ("cell changed", "CV40-R07", "Hardness", "125.1", "126.0"),
        ("run added", "CV40-R99", "", "", ""),
        ("run removed", "CV40-R05", "", "", "")]
    assert client.get(f"/data/{versions[0]}/differences.csv").status_code == 404


def test_api_diff_defaults_to_the_previous_version_and_takes_another(client, actions,
                                                                     versions):
    first, second, third = versions
    actions.login("erin")
    body = client.get(f"/api/v1/data/{second}/diff").get_json()
    assert body["against"] == first and body["matched_by"] == "label"
    assert body["counts"]["cells_changed"] == 1
    assert body["changed_cells"] == [{"key": "CV40-R07", "old_row": 7, "new_row": 6,
                                      "column": "Hardness", "old": 125.1, "new": 126.0}]
    body = client.get(f"/api/v1/data/{third}/diff?against={first}").get_json()
    assert body["against"] == first
    assert body["columns_removed"] == ["Gloss"] and body["columns_added"] == ["Gloss 60"]
    assert body["removed_rows"] == [{"key": "CV40-R05", "row": 5}]
    assert client.get(f"/api/v1/data/{first}/diff").get_json()["against"] is None
    bad = client.get(f"/api/v1/data/{second}/diff?against=x")
    assert bad.status_code == 400 and bad.get_json()["field"] == "against"


def test_api_diff_refuses_a_version_of_another_study(client, actions, db, versions):
    other = h.add_version(db, h.make_study(db, "Other"))
    actions.login("erin")
    response = client.get(f"/api/v1/data/{versions[1]}/diff?against={other}")
    assert response.status_code == 400
    assert "another study" in response.get_json()["error"]


def test_data_page_lists_columns_in_file_order(client, actions, versions):
    actions.login("erin")
    page = client.get(f"/data/{versions[0]}").get_data(as_text=True)
    columns = page.split("<h2>Columns</h2>", 1)[1].split("</table>", 1)[0]
    found = [name for name in DEMO.roles if f'<th scope="row">{name}</th>' in columns]
    assert found == list(DEMO.roles)  # Run order, Panel ID, Cure temperature, …
    positions = [columns.index(f'<th scope="row">{name}</th>') for name in DEMO.roles]
    assert positions == sorted(positions)
