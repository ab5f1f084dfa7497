"""Upload through the web pages: preview before storing, bad input stores nothing.

Each bad-input case goes through the real routes and then proves that no row was added to
data_versions or audit_events (unchanged row counts)."""

from __future__ import annotations

import io
import re
import zipfile

import pytest
from openpyxl import Workbook
from sqlalchemy import func, select
from werkzeug.http import parse_options_header

from app.demo_data import rsm_study
from app.store.models import AuditEvent, DataVersion, Study

GOOD = rsm_study().csv_bytes


def _counts(db) -> tuple[int, int]:
    with db.session() as s:
        return (s.scalar(select(func.count()).select_from(DataVersion)),
                s.scalar(select(func.count()).select_from(AuditEvent)))


@pytest.fixture
def study_id(actions, users, db):
    actions.login("erin")
    response = actions.post("/studies/new", {"title": "Upload tests"})
    assert response.status_code == 302
    with db.session() as s:
        return s.scalar(select(Study.id))


def _upload(actions, study_id, data: bytes, name: str):
    return actions.post(f"/studies/{study_id}/upload",
                        {"file": (io.BytesIO(data), name)}, content_type="multipart/form-data")


def _confirm_form(page_html: str, overrides: dict[str, str] | None = None) -> dict[str, str]:
    """The preview's roles form as the browser would submit it (selected options, values)."""
    form = {}
    for name, options in re.findall(r'<select name="([^"]+)"[^>]*>(.*?)</select>', page_html, re.S):
        chosen = re.search(r'<option value="([^"]+)" selected', options)
        form[name] = chosen.group(1) if chosen else re.search(r'value="([^"]+)"', options).group(1)
    for name, value in re.findall(r'<input name="([^"]+)" value="([^"]*)"', page_html):
        form[name] = value
    form.update(overrides or {})
    return form


def test_preview_then_confirm_stores_one_version(client, actions, db, study_id):
    before = _counts(db)
    response = _upload(actions, study_id, GOOD, "cure.csv")
    assert response.status_code == 302
    assert _counts(db) == before, "the preview must not store anything"
    preview = client.get(response.headers["Location"])
    html = preview.get_data(as_text=True)
    assert "20 data rows" in html and "Cure temperature" in html
    stored = actions.post(response.headers["Location"], _confirm_form(html))
    assert stored.status_code == 302
    versions, events = _counts(db)
    assert versions == before[0] + 1 and events == before[1] + 1
    with db.session() as s:
        v = s.scalar(select(DataVersion))
        assert v.original_bytes == GOOD and v.n_rows == 20
        import hashlib

        assert v.original_sha256 == hashlib.sha256(GOOD).hexdigest()
        assert v.canonical_sha256 == hashlib.sha256(v.canonical_csv).hexdigest()
    page = client.get(stored.headers["Location"])
    assert page.status_code == 200 and "Data version 1" in page.get_data(as_text=True)
    original = client.get(f"/data/{v.id}/original")
    assert original.data == GOOD
    assert original.headers["Content-Disposition"].startswith("attachment;")


def test_preview_of_a_long_upload_shows_twenty_rows_and_a_column_summary(client, actions,
                                                                        study_id):
    lines = ["Run,Temp,Yield,Note"]
    for i in range(1, 501):
        yield_cell = "" if i == 7 else ("n/a" if i == 9 else f"{60 + i / 10:g}")
        lines.append(f"{i},{150 if i % 2 else 170},{yield_cell},note {i}")
    response = _upload(actions, study_id, ("\n".join(lines) + "\n").encode(), "long.csv")
    assert response.status_code == 302
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    assert "500 data rows" in html and "Showing the first 20 of 500 rows." in html
    data = re.search(r'<table class="data">.*?<tbody>(.*?)</tbody>', html, re.S).group(1)
    rows = re.findall(r"<tr>(.*?)</tr>", data, re.S)
    assert len(rows) == 20
    assert "<td>20</td>" in rows[-1] and "note 21" not in html
    summary = re.search(r'<table class="data summary">.*?<tbody>(.*?)</tbody>', html, re.S)
    cells = {re.search(r'<th scope="row">(.*?)</th>', r).group(1): re.findall(r"<td>(.*?)</td>", r)
             for r in re.findall(r"<tr>(.*?)</tr>", summary.group(1), re.S)}
    assert cells == {
        "Run": ["run order", "500", "0", "0", "1", "500"],
        "Temp": ["factor", "500", "0", "0", "150", "170"],
        # one slip ('n/a') among 498 numbers: still the response, storing names the cell
        "Yield": ["response", "498", "1", "1", "60.1", "110"],
        "Note": ["label", "0", "0", "500", "", ""],
    }
    assert "&#39;n/a&#39; in row 9 is not a number; correct it" in html


def test_second_version_needs_a_reason(client, actions, db, study_id):
    for attempt in range(2):
        response = _upload(actions, study_id, GOOD, "cure.csv")
        html = client.get(response.headers["Location"]).get_data(as_text=True)
        form = _confirm_form(html)
        if attempt == 1:
            before = _counts(db)
            refused = actions.post(response.headers["Location"], form)
            assert refused.status_code == 400
            assert "needs a reason" in refused.get_data(as_text=True)
            assert _counts(db) == before
            form["reason"] = "Run 7 hardness re-read from the instrument log"
        assert actions.post(response.headers["Location"], form).status_code == 302
    with db.session() as s:
        versions = s.scalars(select(DataVersion).order_by(DataVersion.version)).all()
        assert [v.version for v in versions] == [1, 2]
        assert versions[1].reason.startswith("Run 7")


def _xlsx_with_formula() -> bytes:
    wb = Workbook()
    ws = wb.active
    ws.append(["A", "B", "Y"])
    ws.append([-1, -1, 3.0])
    ws.append([1, -1, "=A3*2"])
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def _zip_bomb() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as z:
        z.writestr("[Content_Types].xml", "<Types/>")
        z.writestr("xl/workbook.xml", "<workbook/>")
        with z.open("xl/worksheets/sheet1.xml", "w", force_zip64=True) as member:
            chunk = b"<c><v>1</v></c>" * 65536
            for _ in range(250):  # about 250 MB declared, well over the ratio limit
                member.write(chunk)
    return buf.getvalue()


UPLOAD_REFUSALS = [
    ("empty.csv", b"", "empty"),
    ("noheader.csv", b"1,2,3\n4,5,6\n", "header"),
    ("dupes.csv", b"A,A,Y\n1,2,3\n", "A"),
    ("renamed.csv", b"%PDF-1.4 binary\x00\x01", "csv"),
    ("formula.xlsx", _xlsx_with_formula(), "formula"),
    ("bomb.xlsx", _zip_bomb(), ""),
]


@pytest.mark.parametrize("name, data, words", UPLOAD_REFUSALS, ids=[c[0] for c in UPLOAD_REFUSALS])
def test_unreadable_files_are_refused_at_upload(actions, db, study_id, name, data, words):
    before = _counts(db)
    response = _upload(actions, study_id, data, name)
    assert response.status_code in (400, 413)
    html = response.get_data(as_text=True)
    assert "not stored" in html and words.lower() in html.lower()
    assert _counts(db) == before


BAD_TABLES = [
    ("non-numeric factor", "Cure temperature", "hot", "Cure temperature"),
    ("non-numeric response", "Hardness", "n/a", "Hardness"),
    ("non-integer run order", "Run order", "2.5", "Run order"),
    ("duplicate run order", "Run order", "1", "Run order"),
]


def _edit(csv_bytes: bytes, column: str, row: int, value: str) -> bytes:
    lines = csv_bytes.decode().splitlines()
    header = lines[0].split(",")
    cells = lines[row].split(",")
    cells[header.index(column)] = value
    lines[row] = ",".join(cells)
    return ("\n".join(lines) + "\n").encode()


@pytest.mark.parametrize("case, column, value, named", BAD_TABLES, ids=[c[0] for c in BAD_TABLES])
def test_bad_cells_are_named_and_nothing_is_stored(client, actions, db, study_id, case, column,
                                                   value, named):
    data = _edit(GOOD, column, 4, value)
    response = _upload(actions, study_id, data, "bad.csv")
    assert response.status_code == 302
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    before = _counts(db)
    # The user confirms the intended roles even where a bad cell misled the suggestion.
    intended = {"role_0": "run_order", "role_1": "label", "role_2": "factor", "low_2": "150",
                "high_2": "170", "role_5": "response", "role_6": "response"}
    refused = actions.post(response.headers["Location"], _confirm_form(html, intended))
    assert refused.status_code == 400
    text = refused.get_data(as_text=True)
    assert named in text and "row" in text.lower()
    assert _counts(db) == before


def test_constant_factor_and_too_few_runs(client, actions, db, study_id):
    lines = [b"A,B,Y", b"1,5,3.1", b"2,5,3.3"]
    response = _upload(actions, study_id, b"\n".join(lines) + b"\n", "tiny.csv")
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    form = _confirm_form(html, {"role_0": "factor", "role_1": "factor", "role_2": "response",
                                "low_0": "", "high_0": "", "low_1": "", "high_1": ""})
    before = _counts(db)
    refused = actions.post(response.headers["Location"], form)
    text = refused.get_data(as_text=True)
    assert refused.status_code == 400
    assert "constant" in text and "B" in text
    assert "fewer than" in text
    assert _counts(db) == before


def test_over_the_size_limit_is_413_and_stores_nothing(app, actions, db, study_id):
    app.config["MAX_UPLOAD_BYTES"] = 1000
    before = _counts(db)
    response = _upload(actions, study_id, GOOD + b"\n" * 2000, "big.csv")
    assert response.status_code == 413
    assert _counts(db) == before


def test_someone_elses_staged_upload_is_not_found(app, client, actions, db, study_id, users):
    response = _upload(actions, study_id, GOOD, "cure.csv")
    location = response.headers["Location"]
    actions.logout()
    from tests.conftest import Actions

    other = Actions(app.test_client())
    other.login("root")  # admin: not an engineer → refused before the staging lookup
    assert other.client.get(location).status_code == 403


def test_canonical_download_neutralises_formula_text_but_keeps_numbers(client, actions, db,
                                                                      study_id):
    data = _edit(GOOD, "Panel ID", 2, "=HYPERLINK(\"http://x\")")
    response = _upload(actions, study_id, data, "cure.csv")
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    stored = actions.post(response.headers["Location"], _confirm_form(html))
    assert stored.status_code == 302
    version_id = int(stored.headers["Location"].rsplit("/", 1)[1])
    download = client.get(f"/data/{version_id}/canonical.csv")
    assert download.headers["Content-Disposition"].startswith("attachment;")
    text = download.get_data(as_text=True)
    assert "'=HYPERLINK" in text
    with db.session() as s:
        assert b"'=HYPERLINK" not in s.get(DataVersion, version_id).canonical_csv
    # Negative numbers stay numbers.
    from app.workflow.csvsafe import neutralise

    assert neutralise("-1.5") == "-1.5" and neutralise("-x") == "'-x"


def _store(client, actions, study_id, data: bytes, name: str) -> int:
    """Upload, confirm the previewed roles, and return the new data version's id."""
    response = _upload(actions, study_id, data, name)
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    stored = actions.post(response.headers["Location"], _confirm_form(html))
    assert stored.status_code == 302
    return int(stored.headers["Location"].rsplit("/", 1)[1])


@pytest.mark.parametrize("name, fallback", [
    ("Messdaten-Ω-試験.csv", "Messdaten--.csv"),
    ("данные опыта.csv", "download.csv"),
    ("Härte Ofen 2, Lauf 1.csv", "Harte_Ofen_2_Lauf_1.csv"),
])
def test_original_downloads_under_its_uploaded_name(client, actions, db, study_id, name,
                                                    fallback):
    version_id = _store(client, actions, study_id, GOOD, name)
    download = client.get(f"/data/{version_id}/original")
    assert download.status_code == 200 and download.data == GOOD
    header = download.headers["Content-Disposition"]
    # WSGI servers write headers as ISO-8859-1, so the name cannot go in as it is: an ASCII
    # fallback name, and the real one encoded per RFC 5987 (as RFC 6266 asks).
    assert header.isascii()
    assert header.startswith(f"attachment; filename={fallback}; filename*=UTF-8''"), header
    disposition, params = parse_options_header(header)
    assert (disposition, params["filename"]) == ("attachment", name)
    # The other downloads of the same version and study work too.
    canonical = client.get(f"/data/{version_id}/canonical.csv")
    assert canonical.status_code == 200
    assert canonical.headers["Content-Disposition"] == (
        f"attachment; filename=study{study_id}_v1_canonical.csv")


@pytest.mark.parametrize("name, fallback, full", [
    ("fit-1-results.json", "fit-1-results.json", None),
    ("試験.xlsx", "download.xlsx", "試験.xlsx"),
    ('a "quoted"; name.csv', "a_quoted_name.csv", 'a "quoted"; name.csv'),
    ("C:\\Users\\me\\Ωmega.csv", "mega.csv", "Ωmega.csv"),
    ("line\r\nbreak.csv", "linebreak.csv", None),
    ("..", "download", None),
])
def test_attachment_header_is_ascii_under_any_name(app, name, fallback, full):
    from app.web.common import attachment

    with app.test_request_context():
        header = attachment(b"x", name, "text/csv").headers["Content-Disposition"]
    assert header.isascii() and "\r" not in header and "\n" not in header
    disposition, params = parse_options_header(header)
    assert disposition == "attachment"
    assert params["filename"] == (full or fallback)
    assert header.startswith(f"attachment; filename={fallback}")
    assert ("filename*=UTF-8''" in header) == (full is not None)


CATEGORICAL = (b"Resin,Temp,Strength\n"
               b"Birch,150,61.5\nAlder,170,64.0\nBirch,170,66.2\n"
               b"Cedar,150,70.9\nAlder,150,60.1\nCedar,170,72.3\n")


def test_preview_offers_and_stores_a_categorical_factor(client, actions, db, study_id):
    response = _upload(actions, study_id, CATEGORICAL, "resin.csv")
    html = client.get(response.headers["Location"]).get_data(as_text=True)
    # the suggester picks the categorical factor for the text column with few names
    assert '<option value="factor_categorical" selected>factor (categorical)</option>' in html
    stored = actions.post(response.headers["Location"], _confirm_form(html))
    assert stored.status_code == 302
    with db.session() as s:
        v = s.scalar(select(DataVersion))
        import json

        assert json.loads(v.roles_json)["Resin"] == {
            "role": "factor", "kind": "categorical", "units": None, "low": None, "high": None}
        assert b"\n1,Birch,150.0,61.5\n" in v.canonical_csv


def test_the_data_page_says_both_its_version_number_and_its_record_number(actions, db, users,
                                                                          client):
    from tests.workflow import helpers as h

    first_study, second_study = h.make_study(db), h.make_study(db, title="Another")
    h.add_version(db, first_study)
    record = h.add_version(db, second_study)  # version 1 of its study, record 2
    actions.login("erin")
    page = client.get(f"/data/{record}").get_data(as_text=True)
    assert "<h1>Data version 1</h1>" in page
    assert f"record {record} in addresses and the API" in page and record == 2


def test_the_preview_says_why_each_role_was_suggested(actions, db, users, client):
    from tests.workflow import helpers as h

    study_id = h.make_study(db)
    actions.login("erin")
    text = b"Temp,Yield\n150,1\n170,2\n150 C,3\n170,4\n150,5\n170,6\n"
    preview = _upload(actions, study_id, text, "odd.csv")
    page = client.get(preview.headers["Location"]).get_data(as_text=True)
    assert "<th>Why</th>" in page
    assert "&#39;150 C&#39; in row 3 is not a number" in page


def test_a_new_version_keeps_the_roles_units_and_levels_confirmed_before(client, actions, db,
                                                                          study_id):
    """Version 1 is stored with units and levels changed by hand; the preview of the next
    file offers those, not what the file alone suggests."""
    first = _upload(actions, study_id, GOOD, "cure.csv")
    html = client.get(first.headers["Location"]).get_data(as_text=True)
    form = _confirm_form(html)
    columns = re.findall(r'<th scope="row">(.*?)</th>',
                         re.search(r'<table class="roles">.*?</table>', html, re.S).group(0))
    hardness = columns.index("Hardness")
    temperature = columns.index("Cure temperature")
    form[f"units_{hardness}"] = "s (pendulum)"
    form[f"low_{temperature}"], form[f"high_{temperature}"] = "151", "169"
    assert actions.post(first.headers["Location"], form).status_code == 302

    second = _upload(actions, study_id, GOOD, "cure-corrected.csv")
    page = client.get(second.headers["Location"]).get_data(as_text=True)
    assert "Columns already in version 1 keep the roles, units and levels confirmed there" in page
    offered = _confirm_form(page)
    assert offered[f"units_{hardness}"] == "s (pendulum)"
    assert (offered[f"low_{temperature}"], offered[f"high_{temperature}"]) == ("151", "169")
    assert offered[f"role_{hardness}"] == "response"
