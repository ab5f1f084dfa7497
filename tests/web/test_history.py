"""The auditor's history: timeline filters, event detail, exports, integrity, reproduce, package."""

from __future__ import annotations

import csv
import io
import json
import zipfile

import pytest
from click.testing import CliRunner
from sqlalchemy import text

from app.cli_audit import audit_group
from app.demo_data import rsm_study
from app.ingest import read_upload, validate
from app.ingest.raw import parse_number
from app.store.models import DataVersion, Fit
from app.workflow import accounts, studies, uploads
from app.workflow.csvsafe import FORMULA_STARTS, safe_csv
from app.workflow.history import neutralise
from app.workflow.package import verify_package
from tests.conftest import PASSWORD
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h


@pytest.fixture
def signed(db, users):
    """A study with an approved fit, logged in as the auditor is up to each test."""
    return h.approved_fit(db, model="quadratic")


def _auditor(actions):
    assert actions.login("otto").status_code == 302


def _events_table(client, url: str) -> str:
    page = client.get(url).get_data(as_text=True)
    return page[page.index('<table class="events">'):]


def test_timeline_filters_by_object_person_action_and_date(db, actions, client, signed):
    study_id, _version, fit_id = signed
    _auditor(actions)
    base = f"/history/studies/{study_id}"
    page = client.get(base).get_data(as_text=True)
    for action in ("study.create", "data.upload", "fit.create", "fit.submit", "fit.approve"):
        assert f"<td>{action}</td>" in page
    assert "submitted → approved" in page and "Audit chain head #" in page
    only_fits = _events_table(client, base + "?object_type=fit")
    assert "fit.approve" in only_fits and "data.upload" not in only_fits
    by_abel = _events_table(client, base + "?person=abel")
    assert "fit.approve" in by_abel and "fit.create" not in by_abel
    by_action = _events_table(client, base + "?action=fit.submit")
    assert "fit.submit" in by_action and "fit.approve" not in by_action
    by_prefix = _events_table(client, base + "?action=fit.")
    assert "fit.submit" in by_prefix and "study.create" not in by_prefix
    assert "No events match." in _events_table(client, base + "?date_from=2999-01-01")
    assert "fit.approve" in _events_table(client, base + "?date_to=2999-01-01")
    bad = client.get(base + "?date_to=yesterday")
    assert bad.status_code == 400 and "yesterday" in bad.get_data(as_text=True)


EXTREME_DATES = [
    ("date_to=9999-12-31", True), ("date_from=0001-01-01", True),
    ("date_from=0001-01-01&date_to=9999-12-31", True),
    ("date_from=9999-12-31", False), ("date_to=0001-01-01", False),
]
BAD_DATES = [("date_to", "99999-01-01"), ("date_from", "10000-01-01"), ("date_to", "2026-02-30"),
             ("date_from", "-001-01-01"), ("date_to", "0000-12-31"), ("date_from", "9" * 400)]
TRAIL_VIEWS = ("", "/export.csv", "/export.json")


def test_the_first_and_last_representable_days_filter(db, actions, client, signed):
    study_id, _version, _fit = signed
    _auditor(actions)
    for query, matches in EXTREME_DATES:
        for suffix in TRAIL_VIEWS:
            response = client.get(f"/history/studies/{study_id}{suffix}?{query}")
            assert response.status_code == 200, (query, suffix)
            body = response.get_data(as_text=True)
            if not suffix:  # the page: its events table, not the filter's choices
                body = body[body.index('<table class="events">'):]
            assert ("fit.approve" in body) == matches, (query, suffix)


def test_a_date_that_is_no_day_is_400_naming_the_field(db, actions, client, signed):
    study_id, _version, _fit = signed
    _auditor(actions)
    for field, value in BAD_DATES:
        for suffix in TRAIL_VIEWS:
            response = client.get(f"/history/studies/{study_id}{suffix}",
                                  query_string={field: value})
            assert response.status_code == 400, (field, value, suffix)
            page = response.get_data(as_text=True)
            assert f"Field &#39;{field}&#39;" in page and "like 2026-03-31" in page, page
            if len(value) > 30:  # a long value is not echoed whole
                assert value[:30] not in page


def test_event_detail_shows_before_and_after(db, actions, client, signed):
    study_id, _version, fit_id = signed
    _auditor(actions)
    with db.session() as s:
        event_id = s.execute(text("SELECT id FROM audit_events WHERE action = 'fit.approve'")
                             ).scalar_one()
    page = client.get(f"/history/events/{event_id}").get_data(as_text=True)
    assert "Before" in page and "After" in page
    assert "submitted" in page and "approved" in page and "manifest_sha256" in page


def test_exports_neutralise_formula_cells_and_carry_the_chain_head(db, actions, client, users):
    with db.transaction() as s:
        accounts.create_user(s, None, username="mal", full_name="-Mallory Minus",
                             roles="engineer", password=PASSWORD)
        study = studies.create_study(s, h.user(s, "mal"), title="=HYPERLINK(\"x\")")
        studies.set_thresholds(s, h.user(s, "mal"), study, review_below=0.1, fail_below=0.02,
                               reason="=cmd|' /C calc'!A0")
        studies.set_thresholds(s, h.user(s, "mal"), study, review_below=0.05, fail_below=0.01,
                               reason="+44 line supervisor asked")
        studies.set_thresholds(s, h.user(s, "mal"), study, review_below=0.06, fail_below=0.01,
                               reason="@SUM(A1:A9)")
        study_id = study.id
    _auditor(actions)
    response = client.get(f"/history/studies/{study_id}/export.csv")
    assert response.status_code == 200
    assert response.headers["Content-Disposition"].startswith("attachment;")
    rows = list(csv.reader(io.StringIO(response.get_data(as_text=True))))
    assert rows[0][2] == "'=HYPERLINK(\"x\")"
    assert rows[1][0] == "chain head" and len(rows[1][2]) == 64
    header = rows[3]
    events = [dict(zip(header, r, strict=True)) for r in rows[4:]]
    assert [e["action"] for e in events] == ["study.create"] + ["study.set_thresholds"] * 3
    assert events[0]["actor_name"] == "'-Mallory Minus (mal)"
    assert events[1]["reason"] == "'=cmd|' /C calc'!A0"
    assert events[2]["reason"] == "'+44 line supervisor asked"
    assert events[3]["reason"] == "'@SUM(A1:A9)"
    for event in events:
        for cell in event.values():
            assert not cell.startswith(("=", "+", "-", "@", "\t", "\r")), cell
    exported = client.get(f"/history/studies/{study_id}/export.json")
    assert exported.headers["Content-Disposition"].startswith("attachment;")
    doc = exported.json
    assert doc["chain_head"]["seq"] == int(rows[1][1])
    # JSON keeps the recorded values exactly (no spreadsheet is involved).
    assert doc["events"][1]["reason"] == "=cmd|' /C calc'!A0"


@pytest.mark.parametrize("cell, shown", [("=1+1", "'=1+1"), ("+1", "'+1"), ("-1", "'-1"),
                                         ("@x", "'@x"), ("\tx", "'\tx"), ("\rx", "'\rx"),
                                         ("1-1", "1-1"), (None, ""), (7, "7")])
def test_neutralise(cell, shown):
    assert neutralise(cell) == shown


def test_integrity_page_names_an_altered_snapshot(db, actions, client, signed):
    _study, _version, fit_id = signed
    _auditor(actions)
    page = client.get("/history/integrity").get_data(as_text=True)
    assert "Everything checked holds." in page and "intact" in page
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET thresholds_json = :t WHERE id = :i"),
                  {"t": json.dumps({"review": 0.2, "fail": 0.01}), "i": fit_id})
    page = client.get("/history/integrity").get_data(as_text=True)
    assert "Something does not hold" in page
    assert "altered" in page and "signature-status invalid" in page


def test_reproduce_matches_then_names_an_altered_coefficient(db, actions, client, signed):
    _study, _version, fit_id = signed
    _auditor(actions)
    page = client.get(f"/history/fits/{fit_id}/reproduce").get_data(as_text=True)
    assert "match the stored ones, term by term and check by check" in page
    assert "differs" not in page
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, fit_id).results_json)
        doc["coefficients"][2]["estimate"] *= 1 + 1e-6
        doc["checks"][0]["verdict"] = "fail"
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": json.dumps(doc), "i": fit_id})
    page = client.get(f"/history/fits/{fit_id}/reproduce").get_data(as_text=True)
    assert "differ from the stored ones" in page and page.count(">differs<") == 2


def _package(actions, client, study_id) -> bytes:
    response = client.get(f"/history/studies/{study_id}/package.zip")
    assert response.status_code == 200 and response.mimetype == "application/zip"
    assert response.headers["Content-Disposition"].startswith("attachment;")
    return response.data


def _rewrite(data: bytes, changes: dict[str, bytes], *, fix_manifest: bool) -> bytes:
    import hashlib

    src = zipfile.ZipFile(io.BytesIO(data))
    files = {n: src.read(n) for n in src.namelist()}
    files.update(changes)
    if fix_manifest:
        manifest = json.loads(files["manifest.json"])
        for name in changes:
            manifest["files"][name] = hashlib.sha256(files[name]).hexdigest()
        files["manifest.json"] = json.dumps(manifest).encode()
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as zf:
        for name, content in files.items():
            zf.writestr(name, content)
    return out.getvalue()


def test_package_verifies_offline_and_a_tampered_one_is_named(db, actions, client, signed,
                                                              tmp_path):
    study_id, _version, fit_id = signed
    _auditor(actions)
    data = _package(actions, client, study_id)
    from app.demo_data import rsm_study

    demo = rsm_study()
    names = zipfile.ZipFile(io.BytesIO(data)).namelist()
    original = zipfile.ZipFile(io.BytesIO(data)).read(f"data/v1/original/{demo.filename}")
    assert original == demo.csv_bytes
    assert {f"fits/{fit_id}/snapshot.json", "audit/chain.json", "audit/chain_head.json",
            "manifest.json"} <= set(names)
    good = tmp_path / "good.zip"
    good.write_bytes(data)
    runner = CliRunner()
    result = runner.invoke(audit_group, ["verify", "--package", str(good)])
    assert result.exit_code == 0, result.output
    assert "package intact" in result.output and "1 signatures" in result.output

    # One byte of the canonical table changed: the manifest names the file.
    zf = zipfile.ZipFile(io.BytesIO(data))
    table = zf.read("data/v1/canonical.csv")
    flipped = table.replace(b"1", b"2", 1)
    bad = tmp_path / "bad.zip"
    bad.write_bytes(_rewrite(data, {"data/v1/canonical.csv": flipped}, fix_manifest=False))
    result = runner.invoke(audit_group, ["verify", "--package", str(bad)])
    assert result.exit_code == 1
    assert "data/v1/canonical.csv does not match its SHA-256" in result.output

    # The snapshot rewritten and the manifest fixed up to match: the signature names it.
    snapshot = json.loads(zf.read(f"fits/{fit_id}/snapshot.json"))
    snapshot["results"]["coefficients"][1]["estimate"] += 0.5
    forged = _rewrite(data, {f"fits/{fit_id}/snapshot.json": json.dumps(snapshot).encode()},
                      fix_manifest=True)
    report = verify_package(forged)
    assert not report.ok
    assert any(f"on fit {fit_id} (Abel Approver): the signed snapshot" in p
               for p in report.problems), report.problems

    # An event of the packaged chain altered: the chain check names it.
    events = json.loads(zf.read("audit/chain.json"))
    events[2]["reason"] = "inserted later"
    report = verify_package(_rewrite(data, {"audit/chain.json": json.dumps(events).encode()},
                                     fix_manifest=True))
    assert any(f"chain broken at event #{events[2]['seq']}" in p for p in report.problems)


def test_cli_verify_against_the_database(app, db, signed, backend, monkeypatch):
    monkeypatch.setenv("PLUMBLINE_DATABASE_URL", app.config["DATABASE_URL"])
    monkeypatch.setenv("PLUMBLINE_SECRET_KEY", "cli-test-only")
    monkeypatch.setenv("PLUMBLINE_INSTANCE_PATH", app.instance_path)
    runner = CliRunner()
    result = runner.invoke(audit_group, ["verify"])
    assert result.exit_code == 0, result.output
    assert result.output.startswith("chain intact:") and "head #" in result.output
    with db.transaction() as s:
        if backend == "sqlite":
            s.execute(text("DROP TRIGGER audit_events_no_update"))
        else:
            s.execute(text("DROP TRIGGER audit_events_no_update ON audit_events"))
        s.execute(text("UPDATE audit_events SET actor_name = 'someone else' WHERE seq = 3"))
    result = runner.invoke(audit_group, ["verify"])
    assert result.exit_code == 1
    assert "chain broken at event #3" in result.output and "altered" in result.output


def test_package_csv_is_spreadsheet_safe_and_the_hashed_table_still_verifies(
        db, actions, client, users, tmp_path):
    demo = rsm_study()
    lines = demo.csv_bytes.decode().splitlines()
    for row, label in ((1, '"=HYPERLINK(""http://x"")"'), (2, "@SUM(A1:A9)"), (3, "-x")):
        cells = lines[row].split(",")
        cells[1] = label  # Panel ID, a label column
        lines[row] = ",".join(cells)
    data = ("\n".join(lines) + "\n").encode()
    name = "Messdaten-Ω-試験.csv"
    study_id = h.make_study(db)
    with db.transaction() as s:
        raw = read_upload(data, name)
        version_id = uploads.add_data_version(
            s, h.user(s, "erin"), studies.get_study(s, study_id), data=data, filename=name,
            raw=raw, table=validate(raw, demo.roles)).id
    fit_id = h.make_fit(db, version_id)
    h.submit(db, fit_id)
    h.sign(db, fit_id)
    with db.session() as s:
        stored = s.get(DataVersion, version_id).canonical_csv
    assert b"=HYPERLINK" in stored and b"'=HYPERLINK" not in stored

    _auditor(actions)
    package = _package(actions, client, study_id)
    zf = zipfile.ZipFile(io.BytesIO(package))
    # The hashed table byte for byte (its SHA-256 is the one the signed snapshot names) ...
    assert zf.read("data/v1/canonical.csv") == stored
    # The original under its UTF-8 name (the ZIP's UTF-8 flag set), not mangled to underscores.
    assert zf.read(f"data/v1/original/{name}") == data
    assert zf.getinfo(f"data/v1/original/{name}").flag_bits & 0x800
    # ... and beside it the copy for spreadsheets, made by the web download's guard.
    copy = zf.read("data/v1/canonical-spreadsheet.csv")
    assert copy == safe_csv(stored) == client.get(f"/data/{version_id}/canonical.csv").data
    cells = [c for row in csv.reader(io.StringIO(copy.decode())) for c in row]
    assert {"'=HYPERLINK(\"http://x\")", "'@SUM(A1:A9)", "'-x"} <= set(cells)
    for cell in cells:
        assert not cell.startswith(FORMULA_STARTS) or parse_number(cell) is not None, cell
    assert "canonical-spreadsheet.csv" in zf.read("README.txt").decode()
    report = verify_package(package)
    assert report.ok, report.problems
    good = tmp_path / "good.zip"
    good.write_bytes(package)
    result = CliRunner().invoke(audit_group, ["verify", "--package", str(good)])
    assert result.exit_code == 0 and "package intact" in result.output, result.output

    # A copy altered (the manifest fixed up to match) no longer says what the table says.
    forged = copy.replace(b"'=HYPERLINK", b"=HYPERLINK")
    report = verify_package(_rewrite(package, {"data/v1/canonical-spreadsheet.csv": forged},
                                     fix_manifest=True))
    assert ["data/v1/canonical-spreadsheet.csv is not the spreadsheet-safe copy of "
            "data/v1/canonical.csv"] == report.problems


def test_event_detail_shows_characters_as_they_are(db, actions, client, signed):
    """An upload's roles carry '°C': the event page shows the character, not a JSON escape
    (and HTML in a value stays text)."""
    _auditor(actions)
    with db.session() as s:
        event_id = s.execute(text("SELECT id FROM audit_events WHERE action = 'data.upload' "
                                  "ORDER BY id LIMIT 1")).scalar_one()
        new_json = s.execute(text("SELECT new_json FROM audit_events WHERE id = :i"),
                             {"i": event_id}).scalar_one()
    assert "\\u00b0C" in new_json or "°C" in new_json
    page = client.get(f"/history/events/{event_id}").get_data(as_text=True)
    assert "°C" in page and "\\u00b0" not in page


def test_event_json_text_escapes_what_would_hide_or_run(app):
    """The filter behind the event page: characters as they are, right-to-left overrides and
    C1 controls as JSON escapes, and markup left to the template's HTML escaping."""
    from flask import render_template_string

    from app.web import json_text

    assert json_text({"units": "°C"}) == '{"units": "°C"}'
    assert json_text(["a\u202eb", "\x85"]) == '["a\\u202eb", "\\u0085"]'
    with app.test_request_context("/"):
        html = render_template_string("<code>{{ v|json_text }}</code>",
                                      v={"x": "</code><script>alert(1)</script>"})
    assert "<script>" not in html and "&lt;script&gt;" in html
