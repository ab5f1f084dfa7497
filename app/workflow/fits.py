"""Fits: run the analysis on a data version and store an immutable, hashed snapshot."""

from __future__ import annotations

import hashlib
import json
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.analysis import AnalysisError, Factor, FitSpec, Thresholds, analyse
from app.store import audit
from app.store.audit import canonical_json
from app.store.models import DataVersion, Fit, User
from app.workflow import NotFound, WorkflowError
from app.workflow.uploads import design_table


def build_spec(version: DataVersion, *, response: str, model: str | None = "linear",
               terms: list[str] | tuple[str, ...] | None = None, transform: str = "none",
               boxcox_lambda: float | None = None,
               exclusions: dict[int, str] | list[tuple[int, str]] | None = None,
               hierarchy: bool = True, reduce_alpha: float | None = None,
               thresholds: Thresholds) -> FitSpec:
    """A FitSpec from the data version's confirmed roles and the user's choices."""
    roles = json.loads(version.roles_json)
    responses = [n for n, r in roles.items() if r["role"] == "response"]
    if response not in responses:
        raise WorkflowError(f"'{response}' is not a response of this data version "
                            f"(responses: {', '.join(responses)}).", field="response")
    factors = tuple(Factor(name=n, low=r.get("low"), high=r.get("high"), units=r.get("units"))
                    for n, r in roles.items() if r["role"] == "factor")
    pick = lambda role: next((n for n, r in roles.items() if r["role"] == role), None)  # noqa: E731
    covariates = tuple((n, r.get("kind") or "numeric") for n, r in roles.items()
                       if r["role"] == "covariate")
    items = exclusions.items() if isinstance(exclusions, dict) else (exclusions or [])
    excl = []
    for row, reason in items:
        try:
            row_number = int(row)
        except (TypeError, ValueError):
            raise WorkflowError(f"Excluded row '{row}' is not a row number.",
                                field="exclusions") from None
        if not 1 <= row_number <= version.n_rows:
            raise WorkflowError(f"Excluded row {row_number} does not exist (rows 1–"
                                f"{version.n_rows}).", field="exclusions")
        if not (reason or "").strip():
            raise WorkflowError(f"Excluding row {row_number} needs a written reason.",
                                field="exclusions")
        excl.append((row_number, reason.strip()))
    try:
        return FitSpec(response=response, factors=factors, run_order=pick("run_order"),
                       block=pick("block"), covariates=covariates, label=pick("label"),
                       model=None if terms else model,
                       terms=tuple(terms) if terms else None, hierarchy=hierarchy,
                       transform=transform, boxcox_lambda=boxcox_lambda,
                       exclusions=tuple(sorted(excl)), reduce_alpha=reduce_alpha,
                       thresholds=thresholds)
    except AnalysisError as exc:
        raise WorkflowError(str(exc), field="spec") from None


def snapshot_document(fit: Fit) -> dict[str, Any]:
    """What a fit's SHA-256 covers: the data it used, the inputs, the results, the software."""
    return {
        "data_version_id": fit.data_version_id,
        "data_canonical_sha256": fit.data_version.canonical_sha256,
        "spec": json.loads(fit.spec_json),
        "results": json.loads(fit.results_json),
        "thresholds": json.loads(fit.thresholds_json),
        "software_version": fit.software_version,
    }


def snapshot_sha256(fit: Fit) -> str:
    return hashlib.sha256(canonical_json(snapshot_document(fit)).encode()).hexdigest()


def snapshot_intact(fit: Fit) -> bool:
    """True when the stored snapshot still hashes to the value recorded at creation."""
    return snapshot_sha256(fit) == fit.snapshot_sha256


def run_analysis(version: DataVersion, spec: FitSpec) -> dict[str, Any]:
    table = design_table(version)
    try:
        return analyse(table.frame, spec).to_dict()
    except AnalysisError as exc:
        raise WorkflowError(str(exc), field="model") from None


def create_fit(session: Session, actor: User, version: DataVersion, spec: FitSpec) -> Fit:
    """Analyse and store the snapshot with its hash; one audit event."""
    results = run_analysis(version, spec)
    fit = Fit(study_id=version.study_id, data_version_id=version.id, data_version=version,
              response=spec.response, spec_json=canonical_json(spec.to_dict()),
              results_json=canonical_json(results),
              thresholds_json=canonical_json(spec.thresholds.to_dict()),
              software_version=results.get("software_version", "unknown"),
              snapshot_sha256="", state="draft", created_by_id=actor.id)
    fit.snapshot_sha256 = snapshot_sha256(fit)
    session.add(fit)
    session.flush()
    verdicts = {c["id"]: c["verdict"] for c in results.get("checks", [])}
    audit.record(session, actor=actor, action="fit.create", object_type="fit", object_id=fit.id,
                 study_id=version.study_id,
                 new={"data_version": version.version, "response": spec.response,
                      "terms": results.get("terms"), "transform": spec.transform,
                      "exclusions": [[r, why] for r, why in spec.exclusions],
                      "thresholds": spec.thresholds.to_dict(), "verdicts": verdicts,
                      "snapshot_sha256": fit.snapshot_sha256})
    return fit


def get_fit(session: Session, fit_id: int) -> Fit:
    fit = session.get(Fit, fit_id)
    if fit is None:
        raise NotFound(f"No fit {fit_id}.", field="fit")
    return fit


def results_of(fit: Fit) -> dict[str, Any]:
    return json.loads(fit.results_json)


def fits_of_study(session: Session, study_id: int) -> list[Fit]:
    return list(session.scalars(select(Fit).where(Fit.study_id == study_id)
                                .order_by(Fit.created_at.desc())))
