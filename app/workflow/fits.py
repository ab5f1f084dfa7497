"""Fits: run the analysis on a data version and store an immutable, hashed snapshot."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterator
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from sqlalchemy import bindparam, select
from sqlalchemy.orm import Session

from app.analysis import AnalysisError, FitSpec, Thresholds, analyse, runstore
from app.analysis.aliases import alias_structure
from app.analysis.boxcox import LAMBDA_RANGE
from app.caches import MB, ByteCache
from app.store import audit
from app.store.audit import canonical_json
from app.store.db import change_marker
from app.store.keys import sealing_ring
from app.store.models import DataVersion, Fit, FitRuns, Signature, User
from app.workflow import NotFound, WorkflowError, csvsafe, in_id_range, teams
from app.workflow.digests import fit_runs_problem as runs_problem
from app.workflow.digests import fit_runs_row as _runs_row
from app.workflow.digests import (  # noqa: F401  (their home is app.workflow.digests)
    fit_snapshot_document as snapshot_document,
)
from app.workflow.digests import fit_snapshot_sha256 as snapshot_sha256
from app.workflow.digests import rows_digest
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
    # Factors in the upload's column order (the roles JSON is stored with sorted keys).
    factors = design_table(version).analysis_factors()
    pick = lambda role: next((n for n, r in roles.items() if r["role"] == role), None)  # noqa: E731
    covariates = tuple((n, r.get("kind") or "numeric") for n, r in roles.items()
                       if r["role"] == "covariate")
    low, high = LAMBDA_RANGE
    # λ as a practitioner would choose it: within the range the Box–Cox search covers (far
    # outside it y^λ overflows, and no data would suggest such a power).
    if boxcox_lambda is not None and not low <= boxcox_lambda <= high:
        raise WorkflowError(f"Box–Cox λ must lie between {low:g} and {high:g}, the range the "
                            f"λ search covers (got {boxcox_lambda:g}).", field="boxcox_lambda")
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


def snapshot_intact(fit: Fit) -> bool:
    """True when the stored snapshot still hashes to the value recorded at creation, and the
    per-run block it names (when it names one) still hashes to the value the snapshot holds."""
    return snapshot_sha256(fit) == fit.snapshot_sha256 and runs_problem(fit) is None


class Analysed(NamedTuple):
    """A fit's results document and its per-run block (app.analysis.runstore)."""

    results: dict[str, Any]
    runs: bytes


def run_analysis(version: DataVersion, spec: FitSpec) -> Analysed:
    table = design_table(version)
    try:
        return Analysed(*analyse(table.frame, spec).stored())
    except AnalysisError as exc:
        raise WorkflowError(str(exc), field="model") from None


# Decoded per-run tables, by (fit id, block hash): a block never changes once stored.
_RUNS = ByteCache(96 * MB)


def runs_of(fit: Fit) -> runstore.RunColumns:
    """The fit's per-run table as columns, from its block or (older fits) its document."""
    summary = results_of(fit).get("runs")
    if not runstore.is_summary(summary):
        return runstore.from_records(summary or [])

    def load() -> runstore.RunColumns:
        row = _runs_row(fit)
        if row is None:
            raise WorkflowError(f"Fit {fit.id} has lost its per-run table.", status=500)
        return runstore.decode(row.data)

    return _RUNS.get_or_build((fit.id, summary["sha256"]), load)


def runs_block(fit: Fit) -> bytes | None:
    """The stored per-run block's bytes (None for fits that keep their runs in the document)."""
    row = _runs_row(fit) if runstore.is_summary(results_of(fit).get("runs")) else None
    return None if row is None else row.data


def plan_fit(version: DataVersion, **choices: Any) -> tuple[FitSpec, Analysed]:
    """Spec and results for a fit with the study's current thresholds, without writing.

    Callers run this before opening their write transaction, so the analysis does not hold the
    database's write lock while it computes."""
    study = version.study
    spec = build_spec(version, thresholds=Thresholds(review=study.review_below,
                                                     fail=study.fail_below), **choices)
    return spec, run_analysis(version, spec)


def create_fit(session: Session, actor: User, version: DataVersion, spec: FitSpec,
               results: Analysed | None = None) -> Fit:
    """Store the snapshot with its hash; one audit event. ``results`` from :func:`plan_fit`
    (computed outside the transaction) or, when None, computed here. Only an engineer on the
    study's team may (app.workflow.teams)."""
    teams.require_act(session, actor, version.study, "fit a model in it")
    results, block = results if results is not None else run_analysis(version, spec)
    fit = Fit(study_id=version.study_id, data_version_id=version.id, data_version=version,
              response=spec.response, spec_json=canonical_json(spec.to_dict()),
              results_json=canonical_json(results),
              thresholds_json=canonical_json(spec.thresholds.to_dict()),
              software_version=results.get("software_version", "unknown"),
              snapshot_sha256="", state="draft", created_by_id=actor.id)
    fit.snapshot_sha256 = snapshot_sha256(fit)
    fit.key_id, fit.seal = sealing_ring(session).seal("fit", fit.snapshot_sha256)
    session.add(fit)
    session.flush()
    session.add(FitRuns(fit_id=fit.id, sha256=runstore.sha256(block), data=block))
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
    fit = session.get(Fit, fit_id) if in_id_range(fit_id) else None
    if fit is None:
        raise NotFound(f"No fit {fit_id}.", field="fit")
    return fit


_FITS, _VERSIONS, _SIGNATURES = Fit.__table__, DataVersion.__table__, Signature.__table__
_BLOCKS = FitRuns.__table__
# The fit's row with its per-run block beside it (None where a fit has none), in one statement.
_FIT_ROW = (select(_FITS, _BLOCKS.c.sha256, _BLOCKS.c.data)
            .select_from(_FITS.outerjoin(_BLOCKS, _BLOCKS.c.fit_id == _FITS.c.id))
            .where(_FITS.c.id == bindparam("fit_id")))
_STUDY_VERSIONS = (select(_VERSIONS.c.id, _VERSIONS.c.version, _VERSIONS.c.canonical_sha256)
                   .where(_VERSIONS.c.study_id == bindparam("study_id"))
                   .order_by(_VERSIONS.c.id))
_FIT_SIGNATURES = (select(_SIGNATURES).where(_SIGNATURES.c.fit_id == bindparam("fit_id"))
                   .order_by(_SIGNATURES.c.id))


def checked_rows(session: Session, fit_id: int) -> list[tuple] | None:
    """The stored rows the fit page's live checks read (snapshot hash, signature validity):
    the fit, its per-run block, its study's data versions and the fit's signatures; None when
    there is no fit.
    Core queries, no objects: pages use them as a cache key (``app.web.pagecache``)."""
    if not in_id_range(fit_id):
        return None
    fit = session.execute(_FIT_ROW, {"fit_id": fit_id}).first()
    if fit is None:
        return None
    versions = session.execute(_STUDY_VERSIONS, {"study_id": fit.study_id}).all()
    signatures = session.execute(_FIT_SIGNATURES, {"fit_id": fit_id}).all()
    return [tuple(fit), *map(tuple, versions), *map(tuple, signatures)]


def aliases_of(fit: Fit, results: dict[str, Any]) -> dict[str, Any] | None:
    """The alias structure of a regular two-level fraction (app.analysis.aliases), read from
    the coded settings of every run (left-out runs included: they were planned), else None."""
    if (results.get("design") or {}).get("kind") != "two_level_fractional_factorial":
        return None
    cols = runs_of(fit)
    coded = np.column_stack([cols.coded[f] for f in cols.factors])
    cube = coded[np.all(np.abs(np.abs(coded) - 1.0) < 1e-4, axis=1)]
    return alias_structure(cube, cols.factors)


def overview(study, fits_newest_first: list[Fit]) -> list[dict[str, Any]]:
    """Every response of the study's latest data version with its latest fit (of any
    version), that fit's state and how many checks pass, want review or fail."""
    if not study.data_versions:
        return []
    latest = max(study.data_versions, key=lambda v: v.version)
    roles = json.loads(latest.roles_json)
    responses = [name for name, r in roles.items() if r.get("role") == "response"]
    rows = []
    for response in responses:
        fit = next((f for f in fits_newest_first if f.response == response), None)
        counts = {"pass": 0, "review": 0, "fail": 0}
        if fit is not None:
            for check in results_of(fit).get("checks", []):
                if check.get("verdict") in counts:
                    counts[check["verdict"]] += 1
        rows.append({"response": response, "fit": fit, "verdicts": counts,
                     "on_latest": fit is not None and fit.data_version_id == latest.id})
    return rows


# Digests of the rows the live checks read, per connection change marker
# (app.store.db.change_marker): while the marker holds, no row can have changed, whoever would
# have changed it (a service, another process, someone with the file).
_LIVE_DIGESTS = ByteCache(1 * MB, sizeof=lambda _v: 256)


def checked_digest(session: Session, fit_id: int,
                   marker: tuple[str, int] | None = None) -> str | None:
    """SHA-256 over :func:`checked_rows` (None when there is no fit); on SQLite recomputed only
    when some connection has committed since this one last looked (``marker`` if the caller
    has read it already)."""
    if not in_id_range(fit_id):
        return None
    marker = marker if marker is not None else change_marker(session)
    found = None if marker is None else _LIVE_DIGESTS.get((marker, fit_id))
    if found is not None:
        return found
    rows = checked_rows(session, fit_id)
    if rows is None:
        return None
    digest = rows_digest(rows)
    if marker is not None:
        _LIVE_DIGESTS.put((marker, fit_id), digest)
    return digest


def results_of(fit: Fit) -> dict[str, Any]:
    return json.loads(fit.results_json)


def fits_of_study(session: Session, study_id: int) -> list[Fit]:
    return list(session.scalars(select(Fit).where(Fit.study_id == study_id)
                                .order_by(Fit.created_at.desc())))


STATISTICS = (("n", "Runs used"), ("p", "Model parameters"), ("df_resid", "Residual df"),
              ("r_squared", "R²"), ("adj_r_squared", "Adjusted R²"),
              ("pred_r_squared", "Predicted R²"), ("s", "Residual SD"), ("press", "PRESS"))


def compare(fit_a: Fit, fit_b: Fit) -> dict[str, Any]:
    """Two stored fits side by side: terms, statistics, verdicts, flagged and excluded runs.

    Pure: reads the stored results documents only (nothing is refitted). Each list item holds
    the value for fit a and fit b, None where a fit lacks it.
    """
    a, b = results_of(fit_a), results_of(fit_b)

    def coefs(doc):
        return {c["term"]: c for c in doc.get("coefficients", [])}

    ca, cb = coefs(a), coefs(b)
    terms = list(ca) + [t for t in cb if t not in ca]
    checks_a = {c["id"]: c for c in a.get("checks", [])}
    checks_b = {c["id"]: c for c in b.get("checks", [])}
    check_ids = list(checks_a) + [i for i in checks_b if i not in checks_a]
    # Only flagged and excluded runs are listed: read them from the columns, never every run.
    runs_a, runs_b = _listed_runs(runs_of(fit_a)), _listed_runs(runs_of(fit_b))
    rows = sorted(set(runs_a) | set(runs_b))

    def run_field(runs, row, key):
        run = runs.get(row)
        return None if run is None else run.get(key)

    return {
        "fits": [{"id": f.id, "response": d.get("response"), "model": d["spec"].get("model"),
                  "transform": (d.get("transform") or {}).get("label"),
                  "data_version_id": f.data_version_id, "snapshot_sha256": f.snapshot_sha256}
                 for f, d in ((fit_a, a), (fit_b, b))],
        "terms": [{"term": t,
                   "a": None if t not in ca else ca[t]["estimate"],
                   "b": None if t not in cb else cb[t]["estimate"],
                   "p_a": None if t not in ca else ca[t].get("p_value"),
                   "p_b": None if t not in cb else cb[t].get("p_value")} for t in terms],
        "statistics": [{"key": k, "label": label, "a": a.get("fit", {}).get(k),
                        "b": b.get("fit", {}).get(k)} for k, label in STATISTICS],
        "checks": [{"id": i,
                    "question": (checks_a.get(i) or checks_b.get(i)).get("question"),
                    "a": (checks_a.get(i) or {}).get("verdict"),
                    "b": (checks_b.get(i) or {}).get("verdict")} for i in check_ids],
        "flagged": [{"row": r, "label": run_field(runs_a, r, "label") or run_field(runs_b, r,
                                                                                     "label"),
                     "a": run_field(runs_a, r, "flags") or [],
                     "b": run_field(runs_b, r, "flags") or []}
                    for r in rows if run_field(runs_a, r, "flags") or run_field(runs_b, r,
                                                                                 "flags")],
        "excluded": [{"row": r, "label": run_field(runs_a, r, "label") or run_field(runs_b, r,
                                                                                      "label"),
                      "a": run_field(runs_a, r, "exclusion_reason")
                      if run_field(runs_a, r, "excluded") else None,
                      "b": run_field(runs_b, r, "exclusion_reason")
                      if run_field(runs_b, r, "excluded") else None}
                     for r in rows if run_field(runs_a, r, "excluded")
                     or run_field(runs_b, r, "excluded")],
    }


def _listed_runs(cols: runstore.RunColumns) -> dict[int, dict[str, Any]]:
    """Flagged or excluded runs by row, as per-run objects."""
    rows = cols.row
    index = sorted(set(np.flatnonzero(cols.excluded).tolist())
                   | set(np.flatnonzero(np.isin(rows, list(cols.flags))).tolist()))
    out = {}
    for i in index:
        out[int(rows[i])] = cols.records(i, i + 1)[0]
    return out


def fits_of_version(session: Session, version_id: int) -> list[Fit]:
    return list(session.scalars(select(Fit).where(Fit.data_version_id == version_id)
                                .order_by(Fit.created_at.desc())))


RUNS_PAGE_MAX = 10_000
RUNS_CSV_CHUNK = 20_000


def runs_csv(fit: Fit) -> Iterator[str]:
    """Every run of the fit as CSV text, in chunks (numbers in full precision; label and
    reason cells neutralised against spreadsheet formulas)."""
    cols = runs_of(fit)
    names = ["row", "run_order", "label", "excluded", "exclusion_reason",
             *[f"actual:{f}" for f in cols.factors], *[f"coded:{f}" for f in cols.factors],
             *runstore.NUMERIC, "flags"]
    header = io.StringIO()
    csv.writer(header, lineterminator="\n").writerow([csvsafe.neutralise_all(n) for n in names])
    yield header.getvalue()
    for start in range(0, len(cols), RUNS_CSV_CHUNK):
        stop = min(start + RUNS_CSV_CHUNK, len(cols))
        part = slice(start, stop)
        rows = cols.row[part].tolist()
        frame = pd.DataFrame({
            "row": rows,
            "run_order": pd.array(np.where(np.isfinite(cols.run_order[part]),
                                           cols.run_order[part], np.nan)).astype("Int64"),
            "label": [csvsafe.neutralise_all(v) for v in
                      (cols.label[part] if cols.label is not None else [None] * (stop - start))],
            "excluded": cols.excluded[part],
            "exclusion_reason": [csvsafe.neutralise_all(cols.exclusion_reason.get(i))
                                 for i in range(start, stop)],
            **{f"actual:{f}": cols.actual[f][part] for f in cols.factors},
            **{f"coded:{f}": cols.coded[f][part] for f in cols.factors},
            **{name: cols.values[name][part] for name in runstore.NUMERIC},
            "flags": [" ".join(cols.flags.get(r, [])) for r in rows],
        })
        yield frame.to_csv(index=False, header=False, lineterminator="\n",
                           float_format="%.17g")


def search_document(fit: Fit) -> dict[str, Any]:
    """The results document with the few per-run fields the setpoint search reads (row,
    excluded, observed, coded and actual settings) in place of the block's summary."""
    results = results_of(fit)
    cols = runs_of(fit)
    factors = cols.factors
    coded = {f: cols.coded[f].tolist() for f in factors}
    actual = {f: cols.actual[f].tolist() for f in factors}
    observed = [None if v != v else v for v in cols.values["observed"].tolist()]
    results["runs"] = [
        {"row": row, "excluded": excluded, "observed": observed[i],
         "coded": {f: coded[f][i] for f in factors}, "actual": {f: actual[f][i] for f in factors}}
        for i, (row, excluded) in enumerate(zip(cols.row.tolist(), cols.excluded.tolist(),
                                                strict=True))]
    return results
