"""The record package carries the study's setpoints: each proposal with its state and history,
its release signatures, its confirmation runs with verdicts and intervals; the offline check
verifies them and names a tampered setpoint file; format 1 packages (no setpoints) still verify.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import zipfile
from pathlib import Path

import pytest
from click.testing import CliRunner

from app.cli_audit import audit_group
from app.ingest.raw import parse_number
from app.store.models import SetpointProposal, Study
from app.workflow import setpoints
from app.workflow.csvsafe import FORMULA_STARTS
from app.workflow.package import FORMAT_VERSION, _safe_name, build_package, verify_package
from tests.workflow import helpers as h

# The setpoint steps as the setpoint tests drive them (they follow the services' signatures).
from tests.workflow.test_setpoints import _pi, confirm, propose, release

# Written by the format 1 builder; tests/data/packages/README.md says how.
FORMAT_1_PACKAGE = Path(__file__).resolve().parents[1] / "data" / "packages" / "format-1.zip"
# A formula-looking original name: the CSV cell must be neutralised, the ZIP name made safe.
RUN_NAME = "=SUM(1)-Bestätigung-試験.csv"


@pytest.fixture
def record(db, users):
    """A study with an approved fit, a released proposal and two confirmation runs of one run
    each (the first inside the interval, the second outside it), plus a draft proposal."""
    study_id, _version, fit_id = h.approved_fit(db)
    pid = propose(db, [fit_id])
    release(db, pid, comment="Agreed with the line supervisor.")
    low, high = _pi(db, pid)["Hardness"]
    inside = confirm(db, pid, f"Run,Hardness\nC1,{(low + high) / 2:.3f}\n".encode(),
                     name=RUN_NAME)
    outside = confirm(db, pid, f"Run,Hardness\nC2,{high + 0.5:.3f}\n".encode())
    draft = propose(db, [fit_id])
    return {"study": study_id, "fit": fit_id, "released": pid, "draft": draft,
            "runs": (inside, outside)}


def _build(db, study_id: int) -> bytes:
    with db.session() as s:
        return build_package(s, s.get(Study, study_id), "test")


def _rewrite(data: bytes, changes: dict[str, bytes | None], *, fix_manifest: bool,
             manifest_edit=None) -> bytes:
    """The package with files replaced (None removes one), optionally re-hashed."""
    src = zipfile.ZipFile(io.BytesIO(data))
    files = {n: src.read(n) for n in src.namelist()}
    for name, content in changes.items():
        if content is None:
            files.pop(name, None)
        else:
            files[name] = content
    manifest = json.loads(files["manifest.json"])
    if fix_manifest:
        for name, content in changes.items():
            if content is None:
                manifest["files"].pop(name, None)
            else:
                manifest["files"][name] = hashlib.sha256(content).hexdigest()
    if manifest_edit:
        manifest_edit(manifest)
    files["manifest.json"] = json.dumps(manifest).encode()
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as zf:
        for name, content in files.items():
            zf.writestr(name, content)
    return out.getvalue()


def _json(data: bytes, name: str):
    return json.loads(zipfile.ZipFile(io.BytesIO(data)).read(name))


def _text(data: bytes, name: str) -> str:
    return zipfile.ZipFile(io.BytesIO(data)).read(name).decode()


def _legacy_csv(rows: list[list[str]], run_id: int) -> bytes:
    """The spreadsheet copy with one run's mean-of-m columns (the last four) left empty, as a
    run recorded under the earlier rule gives them."""
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    for row in rows:
        writer.writerow(row[:-4] + [""] * 4 if row[0] == str(run_id) else row)
    return out.getvalue().encode()


def test_package_carries_proposals_release_signatures_and_confirmations(db, record, tmp_path):
    pid, draft = record["released"], record["draft"]
    inside, outside = record["runs"]
    data = _build(db, record["study"])
    zf = zipfile.ZipFile(io.BytesIO(data))
    names = set(zf.namelist())
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        stored_hash = proposal.snapshot_sha256
        stored_result = setpoints.result_of(proposal)

    # The proposal: the exact signed snapshot, its settings, fits, state and history.
    assert hashlib.sha256(zf.read(f"setpoints/{pid}/snapshot.json")).hexdigest() == stored_hash
    info = json.loads(zf.read(f"setpoints/{pid}/setpoint.json"))
    # The second run failed, so the proposal is marked so (never "released" after that).
    assert info["state"] == "failed" and info["snapshot_sha256"] == stored_hash
    assert info["state_label"] == "confirmation failed"
    assert info["snapshot_intact"] is True
    assert info["optimum"]["settings"] == stored_result["optimum"]["settings"]
    assert [f["id"] for f in info["fits"]] == [record["fit"]]
    assert info["created_by"] == "erin" and info["created_by_name"] == "Erin Engineer"
    assert [e["action"] for e in info["history"]] == [
        "setpoint.propose", "setpoint.release", "setpoint.confirmation",
        "setpoint.confirmation"]
    assert json.loads(zf.read(f"setpoints/{draft}/setpoint.json"))["state"] == "draft"
    assert json.loads(zf.read(f"setpoints/{draft}/signatures.json")) == []

    # Every release signature: printed name, user name, UTC time, meaning, signed hash, validity.
    (sig,) = json.loads(zf.read(f"setpoints/{pid}/signatures.json"))
    assert sig["printed_name"] == "Abel Approver" and sig["signer"] == "abel"
    assert sig["meaning"] == setpoints.RELEASE and sig["signed_at"].endswith("Z")
    assert sig["snapshot_sha256"] == stored_hash and sig["status"] == "valid"
    assert sig["comment"] == "Agreed with the line supervisor."

    # The confirmation runs: observed values, the intervals (one run each: the interval for the
    # mean of one is the single-run PI, here at the released settings), verdicts.
    first = json.loads(zf.read(f"setpoints/{pid}/confirmations/{inside}/confirmation.json"))
    second = json.loads(zf.read(f"setpoints/{pid}/confirmations/{outside}/confirmation.json"))
    pi = stored_result["optimum"]["pi"]["Hardness"]
    assert first["results"]["verdict"] == "pass" and second["results"]["verdict"] == "fail"
    assert first["results"]["responses"]["Hardness"]["pi"] == pi
    assert first["results"]["responses"]["Hardness"]["interval_for_mean"] == pi
    assert first["results"]["rule"].startswith("For each response the mean of the m")
    assert second["results"]["responses"]["Hardness"]["inside"] == [False]
    assert first["filename"] == RUN_NAME and first["recorded_by"] == "erin"
    # The upload under its UTF-8 name, made safe (formula and bracket characters replaced).
    original = f"setpoints/{pid}/confirmations/{inside}/original/_SUM_1_-Bestätigung-試験.csv"
    assert original in names and first["packaged_as"] == "original/_SUM_1_-Bestätigung-試験.csv"
    assert zf.getinfo(original).flag_bits & 0x800  # the ZIP's UTF-8 name flag

    # The spreadsheet copy of the verdicts went through the guard.
    rows = list(csv.reader(io.StringIO(zf.read(f"setpoints/{pid}/confirmations.csv").decode())))
    assert rows[0][0] == "confirmation run"
    assert [(r[0], r[10], r[11]) for r in rows[1:]] == [
        (str(inside), "pass", "pass"), (str(outside), "fail", "fail")]
    assert rows[1][1] == "'" + RUN_NAME
    for cell in (c for row in rows for c in row):
        assert not cell.startswith(FORMULA_STARTS) or parse_number(cell) is not None, cell

    # Listed in the manifest with their hashes; the check passes offline.
    manifest = json.loads(zf.read("manifest.json"))
    assert manifest["format_version"] == FORMAT_VERSION == 2
    assert [e["id"] for e in manifest["setpoints"]] == [pid, draft]
    for name in names - {"manifest.json"}:
        assert manifest["files"][name] == hashlib.sha256(zf.read(name)).hexdigest()
    assert {n for n in names if n.startswith("setpoints/")} <= set(manifest["files"])
    report = verify_package(data)
    assert report.ok, report.problems
    assert (report.setpoints, report.release_signatures, report.confirmation_runs) == (2, 1, 2)
    path = tmp_path / "package.zip"
    path.write_bytes(data)
    result = CliRunner().invoke(audit_group, ["verify", "--package", str(path)])
    assert result.exit_code == 0, result.output
    assert ("2 setpoint proposals with 1 release signatures and 2 confirmation runs"
            in result.output)


def test_runs_at_settings_read_from_the_file_verify_offline(db, record):
    # Three runs with factor columns, one low outside the single-run PI and their mean at the
    # prediction: recorded as a pass, and the offline check remakes that judgement from the
    # packaged fits at the settings run.
    # A second proposal released for this (the first one's confirmation failed).
    pid = record["draft"]
    release(db, pid)
    with db.session() as s:
        released = setpoints.result_of(s.get(SetpointProposal, pid))["optimum"]["settings"]
    run_at = {**released, "Cure time": released["Cure time"] + 0.1}  # within ±0.2 (2 % of 10)
    low, high = _pi(db, pid)["Hardness"]
    first = low - 0.3
    rest = (3 * (low + high) / 2 - first) / 2
    header = ",".join(["Run", *run_at, "Hardness"])
    cells = ",".join(repr(v) for v in run_at.values())
    body = "\n".join([header, *(f"C{n},{cells},{v!r}" for n, v in
                                 enumerate((first, rest, rest), start=1))]).encode()
    run_id = confirm(db, pid, body)
    data = _build(db, record["study"])
    results = _json(data, f"setpoints/{pid}/confirmations/{run_id}/confirmation.json")["results"]
    assert results["settings_run"] == run_at and results["m"] == 3
    assert results["responses"]["Hardness"]["inside"][0] is False
    report = verify_package(data)
    assert report.problems == [] and report.confirmation_runs == 3


def test_a_run_recorded_under_the_earlier_rule_still_verifies(db, record):
    # Runs recorded before the mean-of-m rule stored each value against the signed PI only
    # (no "rule"); the offline check judges such a document by that earlier rule.
    pid = record["released"]
    _inside, outside = record["runs"]
    data = _build(db, record["study"])
    run_name = f"setpoints/{pid}/confirmations/{outside}/confirmation.json"
    run = _json(data, run_name)
    hardness = run["results"]["responses"]["Hardness"]
    run["results"] = {"responses": {"Hardness": {k: hardness[k] for k in (
        "rows", "observed", "pi", "inside", "verdict")}}, "verdict": run["results"]["verdict"],
        "settings": run["results"]["settings"],
        "setpoint_snapshot_sha256": run["results"]["setpoint_snapshot_sha256"]}
    csv_name = f"setpoints/{pid}/confirmations.csv"
    rows = list(csv.reader(io.StringIO(_text(data, csv_name))))
    legacy_csv = _legacy_csv(rows, outside)
    report = verify_package(_rewrite(data, {run_name: json.dumps(run).encode(),
                                            csv_name: legacy_csv}, fix_manifest=True))
    assert report.problems == []
    # ... and still catches a verdict turned round in it.
    run["results"]["verdict"] = "pass"
    hardness_doc = run["results"]["responses"]["Hardness"]
    hardness_doc["verdict"] = "pass"
    report = verify_package(_rewrite(data, {run_name: json.dumps(run).encode(),
                                            csv_name: legacy_csv}, fix_manifest=True))
    assert any(f"confirmation run {outside} of setpoint {pid}: its verdicts are not the ones "
               "its observed values and the signed intervals give" in p
               for p in report.problems), report.problems


def test_a_tampered_setpoint_file_is_named(db, record, tmp_path):
    pid = record["released"]
    inside, _outside = record["runs"]
    data = _build(db, record["study"])
    name = f"setpoints/{pid}/setpoint.json"
    info = _json(data, name)
    info["optimum"]["settings"]["Cure time"] += 1.0
    forged = json.dumps(info).encode()

    # As it stands: the manifest names the file, in the command line's output too.
    bad = tmp_path / "bad.zip"
    bad.write_bytes(_rewrite(data, {name: forged}, fix_manifest=False))
    result = CliRunner().invoke(audit_group, ["verify", "--package", str(bad)])
    assert result.exit_code == 1
    assert f"{name} does not match its SHA-256 in the manifest" in result.output

    # With the manifest fixed up to match: the signed snapshot still names it.
    report = verify_package(_rewrite(data, {name: forged}, fix_manifest=True))
    assert report.problems == [f"setpoint {pid}: setpoint.json does not match the signed "
                               "snapshot in its optimum"]

    # The signed snapshot itself changed: the release signature names it.
    snapshot_name = f"setpoints/{pid}/snapshot.json"
    snapshot = _json(data, snapshot_name)
    snapshot["result"]["optimum"]["pi"]["Hardness"] = [0.0, 1000.0]
    report = verify_package(_rewrite(data, {snapshot_name: json.dumps(snapshot).encode()},
                                     fix_manifest=True))
    assert any(f"on setpoint {pid} (Abel Approver): the signed snapshot SHA-256" in p
               for p in report.problems), report.problems

    # Another printed name on the signature.
    sig_name = f"setpoints/{pid}/signatures.json"
    sigs = _json(data, sig_name)
    sigs[0]["printed_name"] = "Someone Else"
    report = verify_package(_rewrite(data, {sig_name: json.dumps(sigs).encode()},
                                     fix_manifest=True))
    assert any("(Someone Else): its fields do not match its manifest SHA-256" in p
               for p in report.problems), report.problems

    # A failed confirmation run turned into a pass.
    _inside, outside = record["runs"]
    run_name = f"setpoints/{pid}/confirmations/{outside}/confirmation.json"
    run = _json(data, run_name)
    run["results"]["verdict"] = "pass"
    run["results"]["responses"]["Hardness"].update(verdict="pass", inside=[True])
    report = verify_package(_rewrite(data, {run_name: json.dumps(run).encode()},
                                     fix_manifest=True))
    assert any(f"confirmation run {outside} of setpoint {pid}: its verdicts" in p
               for p in report.problems), report.problems

    # The settings the runs were judged at, moved afterwards: the judgement remade from the
    # packaged fits at the recorded settings no longer matches.
    run_name = f"setpoints/{pid}/confirmations/{inside}/confirmation.json"
    run = _json(data, run_name)
    run["results"]["settings_run"]["Cure time"] += 1.0
    report = verify_package(_rewrite(data, {run_name: json.dumps(run).encode()},
                                     fix_manifest=True))
    assert report.problems == [f"confirmation run {inside} of setpoint {pid}: its verdicts are "
                               "not the ones its observed values, its settings and the packaged "
                               "fits give"]

    # A whole proposal left out, manifest and all: the audit chain still knows it.
    removed = {n: None for n in zipfile.ZipFile(io.BytesIO(data)).namelist()
               if n.startswith(f"setpoints/{pid}/")}
    report = verify_package(_rewrite(
        data, removed, fix_manifest=True,
        manifest_edit=lambda m: m.update(setpoints=[e for e in m["setpoints"]
                                                    if e["id"] != pid])))
    assert report.problems == [f"setpoint {pid}: the audit chain records this proposal of the "
                               "study but the package does not hold it"]


def _format_1(data: bytes) -> bytes:
    """The package as format 1 made it: no setpoint files, no setpoint list."""
    removed = {n: None for n in zipfile.ZipFile(io.BytesIO(data)).namelist()
               if n.startswith("setpoints/")}

    def edit(manifest):
        manifest.pop("setpoints")
        manifest["format_version"] = 1

    return _rewrite(data, removed, fix_manifest=True, manifest_edit=edit)


def test_a_format_1_package_without_setpoints_still_verifies(db, record, tmp_path):
    old = _format_1(_build(db, record["study"]))
    assert not [n for n in zipfile.ZipFile(io.BytesIO(old)).namelist()
                if n.startswith("setpoints/")]
    report = verify_package(old)
    assert report.ok, report.problems
    assert report.format_version == 1 and report.setpoints == 0
    path = tmp_path / "old.zip"
    path.write_bytes(old)
    result = CliRunner().invoke(audit_group, ["verify", "--package", str(path)])
    assert result.exit_code == 0, result.output
    assert "format 1 package, made before setpoints were packaged" in result.output
    # Tampering in a format 1 package is still named.
    table = zipfile.ZipFile(io.BytesIO(old)).read("data/v1/canonical.csv")
    bad = _rewrite(old, {"data/v1/canonical.csv": table.replace(b"1", b"2", 1)},
                   fix_manifest=False)
    assert "data/v1/canonical.csv does not match its SHA-256 in the manifest" in \
        verify_package(bad).problems


def test_a_package_the_format_1_builder_wrote_still_verifies():
    old = FORMAT_1_PACKAGE.read_bytes()
    manifest = _json(old, "manifest.json")
    assert manifest["format_version"] == 1 and "setpoints" not in manifest
    events = _json(old, "audit/chain.json")
    # Its chain records a released, confirmed proposal that format 1 did not package.
    assert {"setpoint.propose", "setpoint.release", "setpoint.confirmation"} <= {
        e["action"] for e in events}
    report = verify_package(old)
    assert report.ok, report.problems
    assert report.describe().startswith(
        "package intact: 12 files, 1 signatures, format 1 package, made before setpoints were "
        "packaged; chain intact")
    snapshot = _json(old, "fits/1/snapshot.json")
    snapshot["results"]["coefficients"][1]["estimate"] += 0.5
    report = verify_package(_rewrite(old, {"fits/1/snapshot.json": json.dumps(snapshot).encode()},
                                     fix_manifest=True))
    assert any("on fit 1 (Abel Approver): the signed snapshot" in p for p in report.problems)


def test_a_newer_format_is_refused_not_half_checked(db, record):
    data = _build(db, record["study"])
    report = verify_package(_rewrite(data, {}, fix_manifest=False,
                                     manifest_edit=lambda m: m.update(format_version=3)))
    assert report.problems == ["manifest.json says format version 3; this Plumbline checks "
                               "format versions 1 to 2 (update Plumbline to check it)"]


@pytest.mark.parametrize("name, safe", [
    ("Messdaten-Ω-試験.csv", "Messdaten-Ω-試験.csv"),
    ("Résumé données.xlsx", "Résumé données.xlsx"),
    ("Re\u0301sume\u0301.csv", "Résumé.csv"),          # decomposed accents composed (NFC)
    ("../../etc/passwd", "passwd"),
    ("..\\..\\Windows\\x.csv", "x.csv"),
    ("C:evil.csv", "C_evil.csv"),
    ("..", "upload"),
    ("", "upload"),
    ("a\x00b\nc.csv", "a_b_c.csv"),
    ("x\u202egpj.csv", "x_gpj.csv"),                    # right-to-left override
    ("CON.csv", "_CON.csv"),
    ("data:stream?.csv", "data_stream_.csv"),
])
def test_original_names_keep_their_letters_and_stay_one_safe_name(name, safe):
    assert _safe_name(name) == safe


def test_setpoint_files_of_another_shape_are_named_not_a_crash(db, record):
    pid = record["released"]
    data = _build(db, record["study"])
    name = f"setpoints/{pid}/signatures.json"
    report = verify_package(_rewrite(data, {name: b'["not a signature"]'}, fix_manifest=True))
    assert any(p.startswith(f"setpoint {pid}: its files are not in the form the package writes")
               for p in report.problems), report.problems


def test_an_unsafe_path_inside_a_package_is_named(db, record):
    data = _build(db, record["study"])
    report = verify_package(_rewrite(data, {"data/../../evil.sh": b"echo"}, fix_manifest=True))
    assert "'data/../../evil.sh' is not a safe path inside the package" in report.problems


def test_the_auditor_downloads_it_with_the_setpoints(db, record, actions, client):
    assert actions.login("otto").status_code == 302
    response = client.get(f"/history/studies/{record['study']}/package.zip")
    assert response.status_code == 200 and response.mimetype == "application/zip"
    names = zipfile.ZipFile(io.BytesIO(response.data)).namelist()
    assert f"setpoints/{record['released']}/signatures.json" in names
    report = verify_package(response.data)
    assert report.ok, report.problems
    assert (report.setpoints, report.release_signatures, report.confirmation_runs) == (2, 1, 2)
