"""Data versions: an upload becomes an immutable version with its SHA-256 hashes."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.ingest import ColumnRole, DesignTable, RawTable, load_canonical, read_upload, validate
from app.ingest.diff import TableDifferences, table_differences
from app.store import audit
from app.store.models import DataVersion, Plan, Study, User
from app.workflow import NotFound, WorkflowError, in_id_range, teams


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def parse_upload(data: bytes, filename: str,
                 roles: dict[str, ColumnRole] | Callable[[list[str]], dict[str, ColumnRole]],
                 *, sheet: str | None = None, max_bytes: int, max_cells: int
                 ) -> tuple[RawTable, DesignTable]:
    """Read and validate without storing anything; raises IngestError with the problems.
    ``roles`` may be a function of the file's column names (e.g. roles from a plan)."""
    raw = read_upload(data, filename, sheet, max_bytes=max_bytes, max_cells=max_cells)
    if callable(roles):
        roles = roles([str(c) for c in raw.frame.columns])
    return raw, validate(raw, roles)


def add_data_version(session: Session, actor: User, study: Study, *, data: bytes, filename: str,
                     raw: RawTable, table: DesignTable, reason: str | None = None,
                     plan: Plan | None = None,
                     plan_tolerance: dict | None = None) -> DataVersion:
    """Store a validated upload as the study's next data version, with its audit event.
    Only an engineer on the study's team may (app.workflow.teams). With ``plan``, the version
    is recorded as run from that plan (app.workflow.plans), its settings compared with the
    planned ones within ``plan_tolerance`` (natural units per factor; 1 % of the range where
    not given), and the event says how many deviated."""
    teams.require_act(session, actor, study, "upload data to it")
    latest = session.scalar(select(func.max(DataVersion.version))
                            .where(DataVersion.study_id == study.id)) or 0
    reason = (reason or "").strip() or None
    if latest and not reason:
        raise WorkflowError("A new data version of a study that already has data needs a "
                            "reason (what was corrected and why).", field="reason")
    canonical = table.to_canonical_csv()
    version = DataVersion(
        study_id=study.id, version=latest + 1, filename=filename[:255], file_kind=raw.file_kind,
        sheet=raw.sheet, original_bytes=data, original_sha256=sha256_bytes(data),
        canonical_csv=canonical, canonical_sha256=sha256_bytes(canonical),
        roles_json=table.roles_json(), n_rows=len(table.frame), reason=reason,
        read_info_json=json.dumps({"encoding": raw.encoding, "delimiter": raw.delimiter,
                                   "decimal": raw.decimal, "sheet": raw.sheet}, sort_keys=True),
        created_by_id=actor.id,
    )
    against = None
    if plan is not None:
        from app.workflow import plans

        report = plans.check_upload(plan, table, plan_tolerance)
        against = {"plan_id": plan.id, "tolerance": report["tolerance"],
                   "deviations": len(report["deviations"]), "missing": len(report["missing"]),
                   "extra": len(report["extra"])}
    session.add(version)
    session.flush()
    if plan is not None:
        plans.link_upload(session, version, plan, against["tolerance"])
    audit.record(session, actor=actor, action="data.upload", object_type="data_version",
                 object_id=version.id, study_id=study.id, reason=reason,
                 new={"version": version.version, "filename": version.filename,
                      "original_sha256": version.original_sha256,
                      "canonical_sha256": version.canonical_sha256, "rows": version.n_rows,
                      "roles": json.loads(version.roles_json),
                      **({"plan": against} if against else {})})
    return version


def get_data_version(session: Session, version_id: int) -> DataVersion:
    version = session.get(DataVersion, version_id) if in_id_range(version_id) else None
    if version is None:
        raise NotFound(f"No data version {version_id}.", field="data_version")
    return version


def design_table(version: DataVersion) -> DesignTable:
    """The stored canonical table, checked against its hash before use."""
    if sha256_bytes(version.canonical_csv) != version.canonical_sha256:
        raise WorkflowError(f"Data version {version.id} does not match its stored hash.",
                            status=500)
    return load_canonical(version.canonical_csv, version.roles_json)


def latest_version(session: Session, study_id: int) -> DataVersion | None:
    """The study's newest data version (None before the first upload)."""
    return session.scalar(select(DataVersion).where(DataVersion.study_id == study_id)
                          .order_by(DataVersion.version.desc()).limit(1))


def carried_roles(session: Session, study_id: int,
                  columns: list[str]) -> tuple[int | None, dict[str, ColumnRole]]:
    """The roles (with units, levels and kind) the newest version gave to columns of the same
    name: a corrected file keeps what was confirmed before. (version number, roles)."""
    latest = latest_version(session, study_id)
    if latest is None:
        return None, {}
    before = json.loads(latest.roles_json)
    return latest.version, {c: ColumnRole.from_dict(before[c]) for c in columns if c in before}


def previous_version(session: Session, version: DataVersion) -> DataVersion | None:
    """The study's data version just before ``version`` (None for the first)."""
    return session.scalar(select(DataVersion).where(DataVersion.study_id == version.study_id,
                                                    DataVersion.version < version.version)
                          .order_by(DataVersion.version.desc()).limit(1))


def version_differences(session: Session, version: DataVersion, against_id: int | None = None
                        ) -> tuple[DataVersion | None, TableDifferences | None]:
    """``version`` compared with another version of the same study (default: the previous
    one): that version and the differences from it to ``version``, or (None, None)."""
    if against_id is None:
        against = previous_version(session, version)
    else:
        against = get_data_version(session, against_id)
        if against.study_id != version.study_id:
            raise WorkflowError(f"Data version {against_id} belongs to another study; compare "
                                "versions of the same study.", field="against")
    if against is None:
        return None, None
    return against, table_differences(design_table(against), design_table(version))
