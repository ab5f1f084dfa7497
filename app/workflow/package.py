"""The record package of a study, for inspection (21 CFR 11.10(b)), and its offline check.

One ZIP holds the original upload bytes and canonical table of every data version, every fit
snapshot document, the signatures, every setpoint proposal of the study (its signed snapshot, its
state and history, its release signatures, its confirmation runs with their verdicts and the
intervals they were judged against), the whole audit chain (so the hash chain verifies without
the database), the chain head, and ``manifest.json`` with the SHA-256 of every other file.
:func:`verify_package` needs only the ZIP.

Format versions. Format 1 packages carry no setpoints; format 2 adds ``setpoints/`` and the
manifest's ``setpoints`` list. :func:`verify_package` reads both: a format 1 package verifies as
it always did (its report notes that setpoints were not packaged), a format 2 package must hold
every setpoint proposal its audit chain records for the study, and a package of a format newer
than :data:`FORMAT_VERSION` is refused rather than half-checked.

Original file names are kept in the ZIP under their UTF-8 names (letters and digits of any
script), reduced to a single safe name: no folders, no ``..``, no control or path characters.

The canonical table is packaged twice. ``canonical.csv`` holds the stored bytes exactly: their
SHA-256 is the one each fit snapshot (and so each signature) names, and a copy with cells
altered could not be checked against it (an apostrophe added by the guard cannot be told from
one typed in the data). ``canonical-spreadsheet.csv`` is the same table made spreadsheet-safe by
:func:`app.workflow.csvsafe.safe_csv`, the guard the web download uses (formula-looking text
cells get a leading apostrophe, numbers stay as they are); the check recomputes it from
``canonical.csv``, so it cannot say anything the hashed table does not.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import re
import unicodedata
import zipfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.analysis import AnalysisError, runstore
from app.analysis.confirm import judge_confirmation
from app.store import audit
from app.store.audit import ChainReport, canonical_json, verify_chain
from app.store.base import utcnow
from app.store.models import AuditEvent, Fit, SetpointProposal, Study
from app.workflow import confirmations, setpoints
from app.workflow.csvsafe import neutralise, safe_csv
from app.workflow.fits import runs_block, snapshot_document
from app.workflow.reviews import signatures_json
from app.workflow.setpoint_signoff import state_label

FORMAT = "plumbline record package"
# 1: data versions, fits, signatures, audit chain. 2: adds setpoints/ and manifest["setpoints"].
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)
SETPOINTS_FROM = 2
MANIFEST = "manifest.json"
SPREADSHEET_CSV = "canonical-spreadsheet.csv"
RUNS_BLOCK = "runs.bin"
SIGNED_FIELDS = ("fit_id", "signer_id", "printed_name", "signed_at", "meaning", "comment",
                 "snapshot_sha256")
# A release signature's manifest covers the fit-signature fields and the setpoint id.
RELEASE_SIGNED_FIELDS = (*SIGNED_FIELDS, "setpoint_id")
CONFIRMATIONS_CSV = "confirmations.csv"
CONFIRMATIONS_HEADER = ("confirmation run", "file", "recorded by", "recorded at (UTC)",
                        "response", "row", "observed", "95% PI low", "95% PI high", "inside PI",
                        "response verdict", "run verdict", "m", "judged mean",
                        "interval for the mean low", "interval for the mean high")
README = """Plumbline record package

manifest.json          SHA-256 of every other file, the study and the chain head
study.json             the study and its check thresholds
data/v<N>/             each data version: the original upload bytes, the canonical table and
                       version.json (hashes, roles, who uploaded it, the reason)
data/v<N>/canonical.csv  the canonical table byte for byte as stored and hashed; text cells are
                       as recorded, so open it in a text editor, not a spreadsheet
data/v<N>/canonical-spreadsheet.csv  the same table for spreadsheets: text cells that a
                       spreadsheet would run as a formula (starting with = + - @, tab or CR)
                       begin with an apostrophe; numbers are unchanged
fits/<id>/snapshot.json  the exact document whose SHA-256 is the fit's snapshot hash
fits/<id>/runs.bin     the fit's per-run table (format plumbline-runs/1, described in
                       app/analysis/runstore.py), whose SHA-256 the snapshot names
fits/<id>/fit.json     state and who made and submitted it
fits/<id>/signatures.json  signer, printed name, UTC time, meaning, comment, signed hash
fits/<id>/report.pdf   the fit report as printed when the package was made (checks with their
                       charts, exclusions, signatures with their validity then, chain head)
setpoints/<id>/snapshot.json  the exact document whose SHA-256 the release signature signed:
                       the fits (ids and snapshot hashes), goals, bounds, fixed factors, result
setpoints/<id>/setpoint.json  state, who proposed it, the fits it uses, the settings with their
                       predictions and intervals, and its history from the audit chain
setpoints/<id>/signatures.json  each release signature: printed name, user name, UTC time,
                       meaning, comment, signed hash, and its validity when the package was made
setpoints/<id>/confirmations/<run>/  confirmation.json (the rule, observed values and the
                       settings run, the interval for the mean of the runs that decided each
                       verdict, each run against the single-run PI) and original/ (the upload)
setpoints/<id>/confirmations.csv  the confirmation verdicts for spreadsheets (text cells that
                       a spreadsheet would run as a formula begin with an apostrophe)
setpoints/<id>/report.pdf  the setpoint sheet as printed when the package was made
.../original/<name>    every upload byte for byte under its own name (its SHA-256 is the
                       recorded one): a CSV there is as uploaded, so open it in a text editor
                       and use the spreadsheet copies above in a spreadsheet
audit/chain.json       every event of the audit chain (all studies), to verify the hash chain
audit/study_events.json  the sequence numbers of this study's events
audit/chain_head.json  the chain head when the package was made

Check it offline with:  plumbline audit verify --package <this file>
"""


def _member_state(zf: zipfile.ZipFile, present: set[str], name: str,
                  expected: str | None) -> str:
    """"missing", "altered" (its SHA-256 is not ``expected``) or "intact"."""
    if name not in present:
        return "missing"
    return "altered" if _sha(zf.read(name)) != expected else "intact"


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _json_bytes(value: Any) -> bytes:
    return json.dumps(value, indent=1, ensure_ascii=False, sort_keys=True, default=str).encode()


_DEVICE_NAMES = {"CON", "PRN", "AUX", "NUL", *(f"COM{i}" for i in range(1, 10)),
                 *(f"LPT{i}" for i in range(1, 10))}


def _safe_name(name: str) -> str:
    """One file name for inside the ZIP: the last path part, letters and digits of any script
    kept (stored as UTF-8), anything else that is not ``. _ -`` or a space made ``_``; never a
    folder, ``..``, a control character or a Windows device name."""
    base = re.split(r"[\\/]", unicodedata.normalize("NFC", name or ""))[-1]
    base = re.sub(r"[^\w. -]", "_", base).strip(" .")
    if base.split(".")[0].upper() in _DEVICE_NAMES:
        base = "_" + base
    return base or "upload"


def _unsafe_path(name: str) -> bool:
    parts = name.split("/")
    return (name.startswith("/") or "\\" in name or bool(re.match(r"[A-Za-z]:", name))
            or any(part in ("", ".", "..") for part in parts)
            or any(unicodedata.category(c) == "Cc" for c in name))


def build_package(session: Session, study: Study, software_version: str,
                  reports: Mapping[str, bytes] | None = None) -> bytes:
    """The study's record package as ZIP bytes; ``reports`` are the PDF reports to add, by
    their path (:func:`app.workflow.report.study_reports`), hashed in the manifest like every
    other file."""
    files: dict[str, bytes] = {"README.txt": README.encode()}
    files["study.json"] = _json_bytes({
        "id": study.id, "title": study.title, "purpose": study.purpose,
        "process": study.process, "owner": study.owner.username,
        "created_at": study.created_at.isoformat(),
        "thresholds": {"review_below": study.review_below, "fail_below": study.fail_below}})
    for v in study.data_versions:
        folder = f"data/v{v.version}"
        files[f"{folder}/original/{_safe_name(v.filename)}"] = v.original_bytes
        files[f"{folder}/canonical.csv"] = v.canonical_csv
        files[f"{folder}/{SPREADSHEET_CSV}"] = safe_csv(v.canonical_csv)
        files[f"{folder}/version.json"] = _json_bytes({
            "id": v.id, "version": v.version, "filename": v.filename, "file_kind": v.file_kind,
            "sheet": v.sheet, "original_sha256": v.original_sha256,
            "canonical_sha256": v.canonical_sha256, "roles": json.loads(v.roles_json),
            "rows": v.n_rows, "reason": v.reason, "uploaded_by": v.created_by.username,
            "uploaded_at": v.created_at.isoformat()})
    for fit in session.scalars(select(Fit).where(Fit.study_id == study.id).order_by(Fit.id)):
        folder = f"fits/{fit.id}"
        # Exactly the bytes that were hashed, so the signed hash can be recomputed from the file.
        files[f"{folder}/snapshot.json"] = canonical_json(snapshot_document(fit)).encode()
        block = runs_block(fit)
        if block is not None:  # the per-run table whose SHA-256 the snapshot names
            files[f"{folder}/{RUNS_BLOCK}"] = block
        files[f"{folder}/fit.json"] = _json_bytes({
            "id": fit.id, "response": fit.response, "state": fit.state,
            "row_version": fit.row_version, "data_version_id": fit.data_version_id,
            "data_version": fit.data_version.version, "snapshot_sha256": fit.snapshot_sha256,
            "created_by": fit.created_by.username, "created_at": fit.created_at.isoformat(),
            "submitted_by": fit.submitted_by.username if fit.submitted_by else None,
            "submitted_at": fit.submitted_at.isoformat() if fit.submitted_at else None})
        files[f"{folder}/signatures.json"] = _json_bytes(signatures_json(fit))
    events = [audit.event_to_dict(e)
              for e in session.scalars(select(AuditEvent).order_by(AuditEvent.id))]
    seq, head_hash = audit.chain_head(session)
    head = {"seq": seq, "hash": head_hash}
    listed_setpoints = _add_setpoints(session, study, events, files)
    files["audit/chain.json"] = _json_bytes(events)
    files["audit/study_events.json"] = _json_bytes(
        [e["seq"] for e in events if e["study_id"] == study.id])
    files["audit/chain_head.json"] = _json_bytes(head)
    files.update(reports or {})
    manifest = {"format": FORMAT, "format_version": FORMAT_VERSION, "study_id": study.id,
                "created_at": utcnow().isoformat(), "software_version": software_version,
                "chain_head": head, "setpoints": listed_setpoints,
                "files": {name: _sha(data) for name, data in files.items()}}
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(MANIFEST, _json_bytes(manifest))
        for name, data in files.items():
            zf.writestr(name, data)
    return buffer.getvalue()


def _when(moment) -> str | None:
    return None if moment is None else moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _history_entry(event: dict) -> dict[str, Any]:
    """One audit event as the setpoint's history shows it (old and new decoded)."""
    return {"seq": event.get("seq"), "at": event.get("at"),
            "actor_name": event.get("actor_name"), "action": event.get("action"),
            "reason": event.get("reason"), "old": _decoded(event.get("old_json")),
            "new": _decoded(event.get("new_json")), "hash": event.get("hash")}


def _add_setpoints(session: Session, study: Study, events: list[dict],
                   files: dict[str, bytes]) -> list[dict[str, Any]]:
    """Put every setpoint proposal of ``study`` into ``files``; the manifest's list of them."""
    listed = []
    proposals = session.scalars(select(SetpointProposal)
                                .where(SetpointProposal.study_id == study.id)
                                .order_by(SetpointProposal.id))
    for proposal in proposals:
        folder = f"setpoints/{proposal.id}"
        fits = setpoints.fits_of(session, proposal)
        # Exactly the bytes whose SHA-256 the release signature signed.
        files[f"{folder}/snapshot.json"] = canonical_json(
            setpoints.snapshot_document(proposal, fits)).encode()
        result = json.loads(proposal.result_json)
        history = [_history_entry(e) for e in events
                   if (e["object_type"], e["object_id"]) == ("setpoint", str(proposal.id))]
        files[f"{folder}/setpoint.json"] = _json_bytes({
            "id": proposal.id, "study_id": proposal.study_id, "state": proposal.state,
            "state_label": state_label(proposal.state),
            "row_version": proposal.row_version, "snapshot_sha256": proposal.snapshot_sha256,
            "snapshot_intact": setpoints.proposal_intact(session, proposal),
            "created_by": proposal.created_by.username,
            "created_by_name": proposal.created_by.full_name,
            "created_at": _when(proposal.created_at),
            "fits": [{"id": f.id, "response": f.response, "state": f.state,
                      "data_version": f.data_version.version,
                      "snapshot_sha256": f.snapshot_sha256} for f in fits],
            "goals": json.loads(proposal.goals_json), "bounds": json.loads(proposal.bounds_json),
            "fixed": json.loads(proposal.fixed_json), "optimum": result.get("optimum"),
            "caution": result.get("caution"), "history": history})
        signatures = [setpoints.signature_json(session, proposal, sig)
                      for sig in setpoints.release_signatures(session, proposal)]
        files[f"{folder}/signatures.json"] = _json_bytes(signatures)
        runs = []
        for run in proposal.confirmations:
            run_folder = f"{folder}/confirmations/{run.id}"
            original = _safe_name(run.filename)
            files[f"{run_folder}/original/{original}"] = run.original_bytes
            doc = {"id": run.id, "setpoint_id": proposal.id, "filename": run.filename,
                   "packaged_as": f"original/{original}",
                   "original_sha256": run.original_sha256,
                   "recorded_by": run.created_by.username,
                   "recorded_by_name": run.created_by.full_name,
                   "recorded_at": _when(run.created_at),
                   "results": confirmations.results_of(run)}
            files[f"{run_folder}/confirmation.json"] = _json_bytes(doc)
            runs.append(doc)
        if runs:
            files[f"{folder}/{CONFIRMATIONS_CSV}"] = confirmations_csv(runs)
        listed.append({"id": proposal.id, "state": proposal.state,
                       "snapshot_sha256": proposal.snapshot_sha256,
                       "signatures": len(signatures), "confirmation_runs": len(runs)})
    return listed


def confirmations_csv(runs: list[dict]) -> bytes:
    """The confirmation verdicts of one proposal as a spreadsheet-safe CSV, one row per value.

    "inside PI" is each run against the single-observation interval; the response verdict
    comes from the judged mean of its m runs against the interval for the mean (the last four
    columns, empty for runs recorded before that rule).

    Made from the packaged ``confirmation.json`` documents alone, so the offline check remakes
    it; every cell goes through :func:`app.workflow.csvsafe.neutralise` (numbers unchanged).
    """
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow([neutralise(c) for c in CONFIRMATIONS_HEADER])
    for run in runs:
        results = run.get("results") or {}
        for response, v in (results.get("responses") or {}).items():
            low, high = (v.get("pi") or [None, None])[:2]
            mean_low, mean_high = (v.get("interval_for_mean") or [None, None])[:2]
            for row, value, inside in zip(v.get("rows") or [], v.get("observed") or [],
                                          v.get("inside") or [], strict=False):
                writer.writerow([neutralise(c) for c in (
                    run.get("id"), run.get("filename"), run.get("recorded_by_name"),
                    run.get("recorded_at"), response, row, value, low, high,
                    "yes" if inside else "no", v.get("verdict"), results.get("verdict"),
                    v.get("m"), v.get("judged_mean"), mean_low, mean_high)])
    return out.getvalue().encode("utf-8")


@dataclass
class PackageReport:
    problems: list[str] = field(default_factory=list)
    files: int = 0
    signatures: int = 0
    format_version: int | None = None
    setpoints: int = 0
    release_signatures: int = 0
    confirmation_runs: int = 0
    chain: ChainReport | None = None
    # Chain events by (object type, object id), to find the event that recorded a signature.
    events: dict[tuple[Any, Any], list[dict]] = field(default_factory=dict, repr=False)

    @property
    def ok(self) -> bool:
        return not self.problems

    def describe(self) -> str:
        if self.ok:
            if self.format_version is not None and self.format_version < SETPOINTS_FROM:
                setpoint_part = (f"format {self.format_version} package, made before "
                                 "setpoints were packaged")
            else:
                setpoint_part = (f"{self.setpoints} setpoint proposals with "
                                 f"{self.release_signatures} release signatures and "
                                 f"{self.confirmation_runs} confirmation runs")
            return (f"package intact: {self.files} files, {self.signatures} signatures, "
                    f"{setpoint_part}; " + self.chain.describe())
        return "package check failed: " + self.problems[0]


def _load(zf: zipfile.ZipFile, name: str, report: PackageReport) -> Any:
    try:
        return json.loads(zf.read(name))
    except (KeyError, ValueError) as exc:
        report.problems.append(f"{name} is missing or not JSON ({exc})")
        return None


def verify_package(data: bytes) -> PackageReport:
    """Check a record package offline; problems name the file, event or signature at fault.

    Checks: the format version; every path is a plain relative one; every file's SHA-256
    against the manifest (and no unlisted files); the audit chain and its head; each signature's
    manifest hash, that its snapshot hash is the SHA-256 of the fit's snapshot document, and
    that the chain holds the event that recorded it; each snapshot's data hash against the
    packaged canonical table; each spreadsheet-safe copy against the one recomputed from its
    canonical table; and each setpoint proposal (:func:`_check_setpoints`).
    """
    report = PackageReport()
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
    except zipfile.BadZipFile:
        report.problems.append("the file is not a ZIP archive")
        return report
    with zf:
        manifest = _load(zf, MANIFEST, report)
        if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
            report.problems.append("manifest.json is not a Plumbline record package manifest")
            return report
        version = manifest.get("format_version")
        if type(version) is not int or version not in READABLE_VERSIONS:
            report.problems.append(
                f"manifest.json says format version {version!r}; this Plumbline checks format "
                f"versions {READABLE_VERSIONS[0]} to {READABLE_VERSIONS[-1]} (update Plumbline "
                "to check it)")
            return report
        report.format_version = version
        for name in zf.namelist():
            if _unsafe_path(name):
                report.problems.append(f"{name!r} is not a safe path inside the package")
        listed = manifest.get("files", {})
        present = set(zf.namelist()) - {MANIFEST}
        for name in sorted(set(listed) - present):
            report.problems.append(f"{name} is listed in the manifest but missing")
        for name in sorted(present - set(listed)):
            report.problems.append(f"{name} is in the package but not in the manifest")
        for name in sorted(set(listed) & present):
            if _sha(zf.read(name)) != listed[name]:
                report.problems.append(f"{name} does not match its SHA-256 in the manifest")
        report.files = len(present)
        _check_chain(zf, manifest, report)
        _check_fits(zf, present, report)
        _check_spreadsheet_copies(zf, present, report)
        _check_setpoints(zf, present, manifest, report)
    return report


def _check_chain(zf: zipfile.ZipFile, manifest: dict, report: PackageReport) -> None:
    events = _load(zf, "audit/chain.json", report) or []
    head = _load(zf, "audit/chain_head.json", report)
    if head != manifest.get("chain_head"):
        report.problems.append("audit/chain_head.json differs from the manifest's chain head")
    report.chain = verify_chain(events, head)
    if not report.chain.ok:
        report.problems.append(report.chain.describe())
    for e in events:
        report.events.setdefault((e.get("object_type"), e.get("object_id")), []).append(e)


def _recorded_manifests(report: PackageReport, fit_id: Any) -> set[str]:
    found = set()
    for e in report.events.get(("fit", str(fit_id)), []):
        sig = json.loads(e.get("new_json") or "null") or {}
        if isinstance(sig, dict) and isinstance(sig.get("signature"), dict):
            found.add(sig["signature"].get("manifest_sha256"))
    return found


def _check_fits(zf: zipfile.ZipFile, present: set[str], report: PackageReport) -> None:
    canonical = {}
    for name in present:
        if re.fullmatch(r"data/v\d+/version\.json", name):
            info = _load(zf, name, report) or {}
            csv_name = name.replace("version.json", "canonical.csv")
            if csv_name in present:
                canonical[info.get("id")] = _sha(zf.read(csv_name))
    for name in sorted(present):
        match = re.fullmatch(r"fits/(\d+)/snapshot\.json", name)
        if not match:
            continue
        fit_id = int(match.group(1))
        snapshot_bytes = zf.read(name)
        snapshot_hash = _sha(snapshot_bytes)
        snapshot = json.loads(snapshot_bytes)
        fit = _load(zf, f"fits/{fit_id}/fit.json", report) or {}
        if fit.get("snapshot_sha256") != snapshot_hash:
            report.problems.append(f"fit {fit_id}: snapshot.json does not hash to the fit's "
                                   "recorded snapshot SHA-256")
        if canonical.get(snapshot.get("data_version_id")) != snapshot.get("data_canonical_sha256"):
            report.problems.append(f"fit {fit_id}: the canonical table of its data version does "
                                   "not match the hash in the snapshot")
        runs = (snapshot.get("results") or {}).get("runs")
        if runstore.is_summary(runs):
            state = _member_state(zf, present, f"fits/{fit_id}/{RUNS_BLOCK}", runs.get("sha256"))
            if state == "missing":
                report.problems.append(f"fit {fit_id}: its per-run table ({RUNS_BLOCK}) is "
                                       "missing from the package")
            elif state == "altered":
                report.problems.append(f"fit {fit_id}: {RUNS_BLOCK} does not hash to the value "
                                       "its snapshot holds")
        recorded = _recorded_manifests(report, fit_id)
        for sig in _load(zf, f"fits/{fit_id}/signatures.json", report) or []:
            report.signatures += 1
            label = f"signature {sig.get('id')} on fit {fit_id} ({sig.get('printed_name')})"
            fields = {k: sig.get(k) for k in SIGNED_FIELDS}
            if _sha(canonical_json(fields).encode()) != sig.get("manifest_sha256"):
                report.problems.append(f"{label}: its fields do not match its manifest SHA-256")
            if sig.get("snapshot_sha256") != snapshot_hash:
                report.problems.append(f"{label}: the signed snapshot SHA-256 does not match "
                                       "the snapshot document in the package")
            if sig.get("manifest_sha256") not in recorded:
                report.problems.append(f"{label}: no event in the audit chain records it")


def _check_spreadsheet_copies(zf: zipfile.ZipFile, present: set[str],
                              report: PackageReport) -> None:
    """Each ``canonical-spreadsheet.csv`` must be its folder's ``canonical.csv`` through
    :func:`safe_csv`, and nothing else (packages made before it was added have none)."""
    for name in sorted(present):
        if not re.fullmatch(rf"data/v\d+/{re.escape(SPREADSHEET_CSV)}", name):
            continue
        source = name.removesuffix(SPREADSHEET_CSV) + "canonical.csv"
        if source not in present:
            report.problems.append(f"{name} has no {source} beside it to be derived from")
            continue
        try:
            expected = safe_csv(zf.read(source))
        except (UnicodeDecodeError, csv.Error) as exc:
            report.problems.append(f"{source} is not a UTF-8 CSV table ({exc})")
            continue
        if zf.read(name) != expected:
            report.problems.append(f"{name} is not the spreadsheet-safe copy of {source}")


# ---- setpoints (format 2) --------------------------------------------------------------------

def _decoded(text: Any) -> Any:
    try:
        return json.loads(text or "null")
    except ValueError:
        return None


def _check_setpoints(zf: zipfile.ZipFile, present: set[str], manifest: dict,
                     report: PackageReport) -> None:
    """Every setpoint folder, and (format 2 on) that the package holds every proposal of the
    study that its audit chain records."""
    folders = sorted({int(m.group(1)) for name in present
                      if (m := re.fullmatch(r"setpoints/(\d+)/.+", name))})
    if report.format_version < SETPOINTS_FROM:
        for setpoint_id in folders:
            _check_setpoint_safely(zf, present, manifest, setpoint_id, report)
        return
    listed = manifest.get("setpoints")
    if not isinstance(listed, list) or not all(
            isinstance(e, dict) and type(e.get("id")) is int for e in listed):
        report.problems.append("manifest.json has no list of the study's setpoint proposals")
        listed = []
    listed_ids = [e["id"] for e in listed]
    recorded = sorted({int(e["object_id"]) for events in report.events.values() for e in events
                       if e.get("action") == "setpoint.propose"
                       and e.get("study_id") == manifest.get("study_id")
                       and str(e.get("object_id")).isdigit()})
    for setpoint_id in recorded:
        if setpoint_id not in listed_ids:
            report.problems.append(f"setpoint {setpoint_id}: the audit chain records this "
                                   "proposal of the study but the package does not hold it")
    for setpoint_id in folders:
        if setpoint_id not in listed_ids:
            report.problems.append(f"setpoint {setpoint_id}: its files are in the package but "
                                   "the manifest does not list the proposal")
    for entry in listed:
        setpoint_id = entry["id"]
        if setpoint_id not in folders:
            report.problems.append(f"setpoint {setpoint_id}: listed in the manifest but its "
                                   "files are missing")
            continue
        info = _check_setpoint_safely(zf, present, manifest, setpoint_id, report)
        if info is not None and (info.get("state"), info.get("snapshot_sha256")) != (
                entry.get("state"), entry.get("snapshot_sha256")):
            report.problems.append(f"setpoint {setpoint_id}: setpoint.json differs from the "
                                   "manifest's entry for it")


def _check_setpoint_safely(zf: zipfile.ZipFile, present: set[str], manifest: dict,
                          setpoint_id: int, report: PackageReport) -> dict | None:
    """:func:`_check_setpoint`, naming the proposal when its files are not shaped as written."""
    try:
        return _check_setpoint(zf, present, manifest, setpoint_id, report)
    except (AttributeError, KeyError, TypeError, ValueError) as exc:
        report.problems.append(f"setpoint {setpoint_id}: its files are not in the form the "
                               f"package writes ({type(exc).__name__}: {exc})")
        return None


def _check_setpoint(zf: zipfile.ZipFile, present: set[str], manifest: dict, setpoint_id: int,
                    report: PackageReport) -> dict | None:
    """One proposal: its snapshot, readable copy, history, release signatures, confirmations."""
    folder = f"setpoints/{setpoint_id}"
    label = f"setpoint {setpoint_id}"
    report.setpoints += 1
    name = f"{folder}/snapshot.json"
    if name not in present:
        report.problems.append(f"{label}: {name} is missing")
        return None
    snapshot_bytes = zf.read(name)
    snapshot_hash = _sha(snapshot_bytes)
    snapshot = _load(zf, name, report)
    info = _load(zf, f"{folder}/setpoint.json", report)
    if not isinstance(snapshot, dict) or not isinstance(info, dict):
        return None
    if info.get("snapshot_sha256") != snapshot_hash:
        report.problems.append(f"{label}: snapshot.json does not hash to the proposal's recorded "
                               "snapshot SHA-256")
    if snapshot.get("study_id") != manifest.get("study_id") or info.get("id") != setpoint_id:
        report.problems.append(f"{label}: it belongs to another study or proposal")
    result = snapshot.get("result") if isinstance(snapshot.get("result"), dict) else {}
    optimum = result.get("optimum") if isinstance(result.get("optimum"), dict) else {}
    readable = {"optimum": info.get("optimum"), "goals": info.get("goals"),
                "bounds": info.get("bounds"), "fixed": info.get("fixed"),
                "fits": [{k: f.get(k) for k in ("id", "response", "snapshot_sha256")}
                         for f in info.get("fits") or [] if isinstance(f, dict)]}
    signed = {"optimum": optimum, "goals": snapshot.get("goals"),
              "bounds": snapshot.get("bounds"), "fixed": snapshot.get("fixed"),
              "fits": snapshot.get("fits")}
    for key in readable:
        if readable[key] != signed[key]:
            report.problems.append(f"{label}: setpoint.json does not match the signed "
                                   f"snapshot in its {key}")
    models = {}
    for fit in snapshot.get("fits") or []:
        fit_snapshot = f"fits/{fit.get('id')}/snapshot.json"
        state = _member_state(zf, present, fit_snapshot, fit.get("snapshot_sha256"))
        if state == "missing":
            report.problems.append(f"{label}: fit {fit.get('id')}, which it uses, is not in the "
                                   "package")
        elif state == "altered":
            report.problems.append(f"{label}: fit {fit.get('id')}'s snapshot in the package is "
                                   "not the one the proposal names")
        else:
            models[fit.get("response")] = (_load(zf, fit_snapshot, report) or {}).get("results")
    events = report.events.get(("setpoint", str(setpoint_id)), [])
    _check_history(info, events, snapshot_hash, label, report)
    for sig in _load(zf, f"{folder}/signatures.json", report) or []:
        report.release_signatures += 1
        sig_label = (f"release signature {sig.get('id')} on {label} "
                     f"({sig.get('printed_name')})")
        fields = {k: sig.get(k) for k in RELEASE_SIGNED_FIELDS}
        if _sha(canonical_json(fields).encode()) != sig.get("manifest_sha256"):
            report.problems.append(f"{sig_label}: its fields do not match its manifest SHA-256")
        if sig.get("setpoint_id") != setpoint_id or sig.get("snapshot_sha256") != snapshot_hash:
            report.problems.append(f"{sig_label}: the signed snapshot SHA-256 does not match "
                                   "the proposal's snapshot document in the package")
        recorded = set()
        for e in events:
            new = _decoded(e.get("new_json"))
            if (e.get("action") == "setpoint.release" and isinstance(new, dict)
                    and isinstance(new.get("signature"), dict)):
                recorded.add(new["signature"].get("manifest_sha256"))
        if sig.get("manifest_sha256") not in recorded:
            report.problems.append(f"{sig_label}: no event in the audit chain records it")
    _check_confirmations(zf, present, folder, optimum, models, snapshot_hash, events, label,
                         report)
    return info


def _check_history(info: dict, events: list[dict], snapshot_hash: str, label: str,
                   report: PackageReport) -> None:
    """The history in setpoint.json is the chain's events for the proposal, all of them, and
    the state it claims is the one they lead to."""
    expected = [_history_entry(e) for e in events]
    if info.get("history") != expected:
        report.problems.append(f"{label}: its history differs from the audit chain's events for "
                               "it")
    proposed = [e for e in events if e.get("action") == "setpoint.propose"]
    if not proposed:
        report.problems.append(f"{label}: no event in the audit chain records the proposal")
    elif (_decoded(proposed[0].get("new_json")) or {}).get("snapshot_sha256") != snapshot_hash:
        report.problems.append(f"{label}: the audit chain recorded another snapshot SHA-256 "
                               "when it was proposed")
    state = "draft"
    for e in events:
        new = _decoded(e.get("new_json"))
        if isinstance(new, dict) and isinstance(new.get("state"), str):
            state = new["state"]
    if info.get("state") != state:
        report.problems.append(f"{label}: setpoint.json says it is {info.get('state')}, the audit "
                               f"chain says {state}")


def _close(a: Any, b: Any) -> bool:
    """Equal documents, numbers equal to 1e-9 relative (they went through JSON and back)."""
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_close(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_close(x, y) for x, y in zip(a, b, strict=True))
    numbers = (int, float)
    if (isinstance(a, numbers) and isinstance(b, numbers)
            and not isinstance(a, bool) and not isinstance(b, bool)):
        return math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12)
    return a == b


def _judged_again(results: dict, models: dict, optimum: dict) -> dict | None:
    """The judgement of a run recorded under the mean-of-m rule, remade from its observed
    values and settings, the signed released settings and the packaged fits; None when the
    stored document cannot be read back into runs."""
    try:
        observed: dict[Any, dict] = {}
        for response, v in results["responses"].items():
            for row, value in zip(v["rows"], v["observed"], strict=True):
                observed.setdefault(row, {})[response] = value
        runs = [{"row": r["row"], "settings": r["settings"], "responses": observed[r["row"]]}
                for r in results["runs"]]
        again = judge_confirmation({r: models[r] for r in results["responses"]},
                                   optimum["settings"], runs, results.get("tolerance"),
                                   level=results["level"])
    except (AnalysisError, KeyError, TypeError, ValueError):
        return None
    return json.loads(canonical_json(setpoints._finite(again)))


def _check_recorded(event: dict | None, doc: dict, results: dict, verdicts: dict,
                    run_label: str, report: PackageReport) -> None:
    if event is None:
        report.problems.append(f"{run_label}: no event in the audit chain records it")
    elif (event.get("original_sha256"), event.get("verdict"), event.get("verdicts")) != (
            doc.get("original_sha256"), results.get("verdict"), verdicts):
        report.problems.append(f"{run_label}: it differs from what the audit chain recorded")


def _check_confirmations(zf: zipfile.ZipFile, present: set[str], folder: str, optimum: dict,
                         models: dict, snapshot_hash: str, events: list[dict], label: str,
                         report: PackageReport) -> None:
    """Each run's upload against its recorded hash, its judgement remade (from the packaged
    fits at its settings run; a run recorded before that rule against the signed snapshot's
    intervals), the chain's record of it, and the spreadsheet copy."""
    recorded = {}
    for e in events:
        new = _decoded(e.get("new_json"))
        if e.get("action") == "setpoint.confirmation" and isinstance(new, dict):
            recorded[new.get("confirmation_run")] = new
    runs = []
    signed_pi = optimum.get("pi") if isinstance(optimum.get("pi"), dict) else {}
    found = sorted((int(m.group(1)), name) for name in present
                   if (m := re.fullmatch(rf"{folder}/confirmations/(\d+)/confirmation\.json",
                                         name)))
    for run_id, name in found:
        run_label = f"confirmation run {run_id} of {label}"
        report.confirmation_runs += 1
        doc = _load(zf, name, report)
        if not isinstance(doc, dict) or not isinstance(doc.get("results"), dict):
            report.problems.append(f"{run_label}: confirmation.json holds no results")
            continue
        runs.append(doc)
        original = f"{folder}/confirmations/{run_id}/{doc.get('packaged_as')}"
        if original not in present:
            report.problems.append(f"{run_label}: its uploaded file is missing")
        elif _sha(zf.read(original)) != doc.get("original_sha256"):
            report.problems.append(f"{run_label}: the uploaded file does not hash to its "
                                   "recorded SHA-256")
        results = doc["results"]
        if results.get("setpoint_snapshot_sha256") != snapshot_hash:
            report.problems.append(f"{run_label}: it names another snapshot than the proposal's")
        responses = results.get("responses") if isinstance(results.get("responses"), dict) else {}
        verdicts = {r: v.get("verdict") for r, v in responses.items()}
        if "rule" in results:
            again_doc = _judged_again(results, models, optimum)
            stored = {k: v for k, v in results.items() if k != "setpoint_snapshot_sha256"}
            if again_doc is None or not _close(again_doc, stored):
                report.problems.append(f"{run_label}: its verdicts are not the ones its observed "
                                       "values, its settings and the packaged fits give")
            _check_recorded(recorded.get(run_id), doc, results, verdicts, run_label, report)
            continue
        observed, intervals = {}, {}
        for response, v in responses.items():
            if v.get("pi") != signed_pi.get(response):
                report.problems.append(f"{run_label}: the interval for '{response}' is not the "
                                       "one in the signed snapshot")
            observed[response] = list(zip(v.get("rows") or [], v.get("observed") or [],
                                          strict=False))
            intervals[response] = signed_pi.get(response)
        try:
            again = confirmations.judge(observed, intervals)
        except (TypeError, ValueError):
            again = None
        overall = ("pass" if again and all(v["verdict"] == "pass" for v in again.values())
                   else "fail")
        if (again is None or any(again[r]["verdict"] != verdicts[r]
                                 or again[r]["inside"] != responses[r].get("inside")
                                 for r in responses) or results.get("verdict") != overall):
            report.problems.append(f"{run_label}: its verdicts are not the ones its observed "
                                   "values and the signed intervals give")
        _check_recorded(recorded.get(run_id), doc, results, verdicts, run_label, report)
    csv_name = f"{folder}/{CONFIRMATIONS_CSV}"
    if runs and csv_name not in present:
        report.problems.append(f"{csv_name} is missing")
    elif csv_name in present and zf.read(csv_name) != confirmations_csv(runs):
        report.problems.append(f"{csv_name} is not the spreadsheet-safe table of the "
                               "confirmation runs beside it")
