"""The record package of a study, for inspection (21 CFR 11.10(b)), and its offline check.

One ZIP holds the original upload bytes and canonical table of every data version, every fit
snapshot document, the signatures, the whole audit chain (so the hash chain verifies without the
database), the chain head, and ``manifest.json`` with the SHA-256 of every other file.
:func:`verify_package` needs only the ZIP.

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
import re
import zipfile
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store import audit
from app.store.audit import ChainReport, canonical_json, verify_chain
from app.store.base import utcnow
from app.store.models import AuditEvent, Fit, Study
from app.workflow.csvsafe import safe_csv
from app.workflow.fits import snapshot_document
from app.workflow.reviews import signatures_json

FORMAT = "plumbline record package"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
SPREADSHEET_CSV = "canonical-spreadsheet.csv"
SIGNED_FIELDS = ("fit_id", "signer_id", "printed_name", "signed_at", "meaning", "comment",
                 "snapshot_sha256")
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
fits/<id>/fit.json     state and who made and submitted it
fits/<id>/signatures.json  signer, printed name, UTC time, meaning, comment, signed hash
audit/chain.json       every event of the audit chain (all studies), to verify the hash chain
audit/study_events.json  the sequence numbers of this study's events
audit/chain_head.json  the chain head when the package was made

Check it offline with:  plumbline audit verify --package <this file>
"""


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _json_bytes(value: Any) -> bytes:
    return json.dumps(value, indent=1, ensure_ascii=False, sort_keys=True, default=str).encode()


def _safe_name(name: str) -> str:
    base = re.split(r"[\\/]", name)[-1]
    return re.sub(r"[^A-Za-z0-9._ -]", "_", base).strip(" .") or "upload"


def build_package(session: Session, study: Study, software_version: str) -> bytes:
    """The study's record package as ZIP bytes."""
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
    files["audit/chain.json"] = _json_bytes(events)
    files["audit/study_events.json"] = _json_bytes(
        [e["seq"] for e in events if e["study_id"] == study.id])
    files["audit/chain_head.json"] = _json_bytes(head)
    manifest = {"format": FORMAT, "format_version": FORMAT_VERSION, "study_id": study.id,
                "created_at": utcnow().isoformat(), "software_version": software_version,
                "chain_head": head, "files": {name: _sha(data) for name, data in files.items()}}
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(MANIFEST, _json_bytes(manifest))
        for name, data in files.items():
            zf.writestr(name, data)
    return buffer.getvalue()


@dataclass
class PackageReport:
    problems: list[str] = field(default_factory=list)
    files: int = 0
    signatures: int = 0
    chain: ChainReport | None = None
    # Chain events by (object type, object id), to find the event that recorded a signature.
    events: dict[tuple[Any, Any], list[dict]] = field(default_factory=dict, repr=False)

    @property
    def ok(self) -> bool:
        return not self.problems

    def describe(self) -> str:
        if self.ok:
            return (f"package intact: {self.files} files, {self.signatures} signatures; "
                    + self.chain.describe())
        return "package check failed: " + self.problems[0]


def _load(zf: zipfile.ZipFile, name: str, report: PackageReport) -> Any:
    try:
        return json.loads(zf.read(name))
    except (KeyError, ValueError) as exc:
        report.problems.append(f"{name} is missing or not JSON ({exc})")
        return None


def verify_package(data: bytes) -> PackageReport:
    """Check a record package offline; problems name the file, event or signature at fault.

    Checks: every file's SHA-256 against the manifest (and no unlisted files); the audit chain
    and its head; each signature's manifest hash, that its snapshot hash is the SHA-256 of the
    fit's snapshot document, and that the chain holds the event that recorded it; each
    snapshot's data hash against the packaged canonical table; each spreadsheet-safe copy
    against the one recomputed from its canonical table.
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
