"""JSON API under /api/v1: studies, data versions and fits, for scripts and other systems.

Authentication is a personal API token (``Authorization: Bearer plb_...``) or a browser session
(which then needs ``X-CSRF-Token`` on POST); app.web.access checks both and answers 401/403 as
JSON. Tokens carry exactly their user's roles. Every operation is described beside its view with
``@document`` and served at ``/api/v1/openapi.json`` to signed-in users and tokens (not publicly:
the description is no secret, but nothing here is meant for anonymous callers).
"""

from __future__ import annotations

import json
from typing import Any

from flask import Blueprint, current_app, g, jsonify, request, url_for
from werkzeug.exceptions import RequestEntityTooLarge

from app.analysis.boxcox import LAMBDA_RANGE
from app.analysis.spec import NAMED_MODELS, TRANSFORMS
from app.ingest import ColumnRole, IngestError, UploadTooLarge, format_size
from app.store.db import database, get_session
from app.store.models import DataVersion, Fit, Study, User
from app.web import api_runs
from app.web.access import SIGNED_IN, allow
from app.web.common import id_field, me, read_session, tx
from app.web.openapi import (
    build_document,
    check,
    document,
    id_parameter,
    json_body,
    ref,
    schema,
)
from app.workflow import WorkflowError, fits, plans, reviews, studies, teams, uploads

bp = Blueprint("api", __name__, url_prefix="/api/v1")

ROLE_NAMES = ("factor", "response", "run_order", "block", "covariate", "label", "ignore")
TIME = {"type": "string", "format": "date-time"}
SHA256 = {"type": "string", "pattern": "^[0-9a-f]{64}$"}
NULLABLE_NUMBER = {"type": ["number", "null"]}

schema("StudyCreate", {
    "type": "object", "additionalProperties": False, "required": ["title"],
    "properties": {
        "title": {"type": "string", "minLength": 1},
        "purpose": {"type": "string"},
        "process": {"type": "string"},
        "review_below": {"type": "number", "description": "p below this: review (0.05)"},
        "fail_below": {"type": "number", "description": "p below this: fail (0.01)"},
    },
    "examples": [{"title": "Cure oven hardness", "purpose": "Settings for the new lacquer",
                  "review_below": 0.05, "fail_below": 0.01}],
})
STUDY_PROPERTIES = {
    "id": {"type": "integer"}, "title": {"type": "string"}, "purpose": {"type": "string"},
    "process": {"type": "string"}, "owner": ref("UserRef"), "created_at": TIME,
    "review_below": {"type": "number"}, "fail_below": {"type": "number"},
}
schema("Study", {"type": "object", "required": list(STUDY_PROPERTIES),
                 "properties": STUDY_PROPERTIES})
schema("ColumnRole", {
    "type": "object", "additionalProperties": False, "required": ["role"],
    "properties": {
        "role": {"type": "string", "enum": list(ROLE_NAMES)},
        "units": {"type": ["string", "null"]},
        "low": {**NULLABLE_NUMBER, "description": "Continuous factors: the level coded -1"},
        "high": {**NULLABLE_NUMBER, "description": "Continuous factors: the level coded +1"},
        "kind": {"type": ["string", "null"], "enum": ["numeric", "categorical", None],
                 "description": "Covariates: numeric or categorical. Factors: categorical for "
                                "a factor whose levels are names (kept as text in order of "
                                "first appearance; no low or high); left out or null for a "
                                "continuous factor"},
    },
})
ROLES_SCHEMA = {"type": "object", "additionalProperties": ref("ColumnRole"),
                "description": "Column name to its role; columns not named are ignored."}
schema("DataUpload", {
    "type": "object", "required": ["file"],
    "properties": {
        "file": {"type": "string", "contentMediaType": "application/octet-stream",
                 "description": "The CSV or XLSX file"},
        "roles": {"type": "string", "contentMediaType": "application/json",
                  "description": "JSON: " + ROLES_SCHEMA["description"] + " Required unless "
                                 "plan_id is given (the roles then come from the plan)."},
        "plan_id": {"type": "string", "pattern": "^[0-9]+$",
                    "description": "The plan these runs were made from: each setting is "
                                   "compared with the planned one"},
        "tolerance": {"type": "string", "contentMediaType": "application/json",
                      "description": "JSON: factor name to the deviation allowed from its "
                                     "planned setting, in natural units (1 % of the factor's "
                                     "range where not given)"},
        "sheet": {"type": "string", "description": "XLSX sheet (the first when omitted)"},
        "reason": {"type": "string",
                   "description": "Required when the study already has a data version"},
    },
})
FIT_SUMMARY_PROPERTIES = {
    "id": {"type": "integer"},
    "state": {"type": "string", "enum": ["draft", "submitted", "approved", "returned",
                                         "superseded", "withdrawn"]},
    "response": {"type": "string"}, "study_id": {"type": "integer"},
    "data_version_id": {"type": "integer"}, "snapshot_sha256": SHA256, "created_at": TIME,
    "created_by": ref("UserRef"),
}
schema("FitSummary", {"type": "object", "required": list(FIT_SUMMARY_PROPERTIES),
                      "properties": FIT_SUMMARY_PROPERTIES})
DATA_PROPERTIES = {
    "id": {"type": "integer"}, "study_id": {"type": "integer"}, "version": {"type": "integer"},
    "filename": {"type": "string"}, "file_kind": {"type": "string", "enum": ["csv", "xlsx"]},
    "sheet": {"type": ["string", "null"]}, "n_rows": {"type": "integer"},
    "original_sha256": SHA256, "canonical_sha256": SHA256, "roles": ROLES_SCHEMA,
    "read_info": {"type": "object"}, "reason": {"type": ["string", "null"]},
    "created_at": TIME, "created_by": ref("UserRef"),
}
schema("DataVersion", {
    "type": "object", "required": list(DATA_PROPERTIES),
    "properties": {**DATA_PROPERTIES, "fits": {
        "type": "array", "items": ref("FitSummary"),
        "description": "Fits made from this version (GET /data/{version_id} only)"},
        "plan_deviations": {
            "type": ["object", "null"],
            "description": "For a version run from a plan: how rows were matched, the "
                           "tolerance, every setting beyond it, missing planned runs and "
                           "unplanned extra runs (GET /data/{version_id} and the upload)"}},
})
schema("StudyDetail", {"allOf": [ref("Study"), {
    "type": "object", "required": ["data_versions", "fits"],
    "properties": {"data_versions": {"type": "array", "items": ref("DataVersion")},
                   "fits": {"type": "array", "items": ref("FitSummary")}}}]})
schema("FitCreate", {
    "type": "object", "additionalProperties": False,
    "oneOf": [{"required": ["response"]}, {"required": ["responses"]}],
    "properties": {
        "response": {"type": "string", "minLength": 1},
        "responses": {"type": "array", "minItems": 1, "uniqueItems": True,
                      "items": {"type": "string", "minLength": 1},
                      "description": "Instead of 'response': the same model fitted to each of "
                                     "these responses, one fit each, in one step"},
        "model": {"type": ["string", "null"], "enum": [*NAMED_MODELS, None],
                  "description": "A named model (linear when neither model nor terms is given)"},
        "terms": {"type": ["array", "null"], "minItems": 1, "items": {"type": "string"},
                  "description": "Explicit terms instead of a model: A, A:B, A^2"},
        "transform": {"type": "string", "enum": list(TRANSFORMS)},
        "boxcox_lambda": {**NULLABLE_NUMBER, "minimum": LAMBDA_RANGE[0],
                          "maximum": LAMBDA_RANGE[1],
                          "description": "λ for transform boxcox (estimated when null)"},
        "hierarchy": {"type": "boolean", "description": "Keep parents of every term (true)"},
        "reduce_alpha": {"type": ["number", "null"], "exclusiveMinimum": 0,
                         "exclusiveMaximum": 1,
                         "description": "Backward reduction at this p when set"},
        "exclusions": {
            "type": ["array", "object"],
            "description": "Runs left out, each with a reason: [{row, reason}] or {row: reason}",
            "items": {"type": "object", "additionalProperties": False,
                      "required": ["row", "reason"],
                      "properties": {"row": {"type": "integer", "minimum": 1},
                                     "reason": {"type": "string", "minLength": 1}}},
            "propertyNames": {"pattern": "^[1-9][0-9]*$"},
            "additionalProperties": {"type": "string", "minLength": 1},
        },
    },
    "examples": [{"response": "Hardness", "model": "quadratic",
                  "exclusions": [{"row": 3, "reason": "panel scratched before measurement"}]}],
})
schema("FitGroup", {
    "type": "object", "required": ["fits"],
    "properties": {"fits": {"type": "array", "items": ref("Fit"),
                            "description": "One fit per response, in the order asked"}}})
schema("Fit", {"allOf": [ref("FitSummary"), {
    "type": "object",
    "required": ["snapshot_intact", "software_version", "spec", "thresholds", "signatures",
                 "runs", "results"],
    "properties": {
        "snapshot_intact": {"type": "boolean",
                            "description": "The stored snapshot still hashes to snapshot_sha256"},
        "software_version": {"type": "string"}, "spec": {"type": "object"},
        "thresholds": {"type": "object"},
        "submitted_at": {"type": ["string", "null"], "format": "date-time"},
        "submitted_by": {"anyOf": [ref("UserRef"), {"type": "null"}]},
        "signatures": {"type": "array", "items": {"type": "object"}},
        "runs": {"type": "object", "required": ["n", "excluded", "flagged", "runs", "runs_csv"],
                 "description": "How many runs, excluded and flagged, and where to read them: "
                                "`runs` (pages of JSON) and `runs_csv` (every run)",
                 "properties": {"n": {"type": "integer"}, "excluded": {"type": "integer"},
                                "flagged": {"type": "integer"}, "runs": {"type": "string"},
                                "runs_csv": {"type": "string"}}},
        "results": {"type": "object", "description": "The stored results document; its `runs` "
                    "is a summary naming the SHA-256 of the per-run table, which the snapshot "
                    "hash so covers (fits stored before that hold every run here instead)"},
    }}]})


# ---- serialisation ------------------------------------------------------------------------

def _when(moment) -> str | None:
    return None if moment is None else moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _user(user: User | None) -> dict[str, Any] | None:
    if user is None:
        return None
    return {"id": user.id, "username": user.username, "full_name": user.full_name}


def _study(study: Study) -> dict[str, Any]:
    return {"id": study.id, "title": study.title, "purpose": study.purpose,
            "process": study.process, "owner": _user(study.owner),
            "created_at": _when(study.created_at), "review_below": study.review_below,
            "fail_below": study.fail_below}


def _data_version(version: DataVersion) -> dict[str, Any]:
    return {"id": version.id, "study_id": version.study_id, "version": version.version,
            "filename": version.filename, "file_kind": version.file_kind,
            "sheet": version.sheet, "n_rows": version.n_rows,
            "original_sha256": version.original_sha256,
            "canonical_sha256": version.canonical_sha256,
            "roles": json.loads(version.roles_json),
            "read_info": json.loads(version.read_info_json), "reason": version.reason,
            "created_at": _when(version.created_at), "created_by": _user(version.created_by)}


def _fit_summary(fit: Fit) -> dict[str, Any]:
    return {"id": fit.id, "state": fit.state, "response": fit.response,
            "study_id": fit.study_id, "data_version_id": fit.data_version_id,
            "snapshot_sha256": fit.snapshot_sha256, "created_at": _when(fit.created_at),
            "created_by": _user(fit.created_by)}


def _fit(fit: Fit) -> dict[str, Any]:
    return {**_fit_summary(fit), "snapshot_intact": fits.snapshot_intact(fit),
            "software_version": fit.software_version, "spec": json.loads(fit.spec_json),
            "thresholds": json.loads(fit.thresholds_json),
            "submitted_at": _when(fit.submitted_at), "submitted_by": _user(fit.submitted_by),
            "signatures": reviews.signatures_json(fit),
            "runs": {**fits.runs_of(fit).summary(), **api_runs.links(fit.id)},
            "results": fits.results_of(fit)}


def _created(body: dict[str, Any], location: str):
    response = jsonify(body)
    response.status_code = 201
    response.headers["Location"] = location
    return response


# ---- views --------------------------------------------------------------------------------

@bp.route("/openapi.json")
@allow(SIGNED_IN)
@document("GET", "/openapi.json", "This description of the API", tags=("API",),
          responses={200: ("The OpenAPI 3.1 document", {"type": "object"})})
def openapi_document():
    cfg = current_app.config
    return jsonify(build_document(cfg["SOFTWARE_VERSION"], cfg["SESSION_COOKIE_NAME"]))


@bp.route("/studies", methods=["POST"])
@allow("engineer")
@document("POST", "/studies", "Create a study", request_schema="StudyCreate", tags=("Studies",),
          responses={201: ("The new study", "Study")})
def create_study():
    """Thresholds default to review below p = 0.05 and fail below p = 0.01."""
    body = json_body("StudyCreate")
    for key in ("review_below", "fail_below"):
        if key in body:
            body[key] = float(body[key])
    with tx() as s:
        study = studies.create_study(s, me(s), **body)
        out = _study(study)
    return _created(out, url_for("api.get_study", study_id=study.id))


@bp.route("/studies")
@allow(SIGNED_IN)
@document("GET", "/studies", "List the studies you may read, newest first", tags=("Studies",),
          responses={200: ("The studies", {"type": "object", "required": ["studies"],
                                           "properties": {"studies": {"type": "array",
                                                                      "items": ref("Study")}}})})
def list_studies():
    """Only the studies the caller may read: engineers see the studies whose team they are on;
    approvers, auditors and admins see every study."""
    readable = teams.readable_studies(get_session(), g.user)
    return jsonify({"studies": [_study(s) for s in readable]})


@bp.route("/studies/<int:study_id>")
@allow(SIGNED_IN)
@document("GET", "/studies/{study_id}", "A study with its data versions and fits",
          tags=("Studies",), responses={200: ("The study", "StudyDetail")})
def get_study(study_id: int):
    session = get_session()
    study = studies.get_study(session, study_id)
    return jsonify({**_study(study),
                    "data_versions": [_data_version(v) for v in study.data_versions],
                    "fits": [_fit_summary(f) for f in fits.fits_of_study(session, study.id)]})


def _limits() -> dict[str, int]:
    cfg = current_app.config
    return {"max_bytes": int(cfg["MAX_UPLOAD_BYTES"]), "max_cells": int(cfg["MAX_UPLOAD_CELLS"])}


def _roles_field(text: str | None) -> dict[str, ColumnRole]:
    """The ``roles`` form field: JSON mapping column names to ColumnRole fields."""
    if text is None or not text.strip():
        raise WorkflowError("Field 'roles' is required: JSON mapping each column to "
                            "{role, units, low, high, kind}.", field="roles")
    try:
        value = json.loads(text)
    except ValueError as exc:
        raise WorkflowError(f"Field 'roles' is not valid JSON: {exc}.", field="roles") from None
    check(value, ROLES_SCHEMA, "roles")
    roles = {}
    for name, fields in value.items():
        try:
            roles[name] = ColumnRole.from_dict(fields)
        except IngestError as exc:
            raise WorkflowError(f"Field 'roles.{name}': {exc}", field=f"roles.{name}") from None
    return roles


def _refused_upload(exc: IngestError, status: int):
    response = jsonify({"error": f"The file was not stored. {exc}", "status": status,
                        "field": "file", "problems": [p.to_dict() for p in exc.problems]})
    response.status_code = status
    return response


@bp.route("/studies/<int:study_id>/data", methods=["POST"])
@allow("engineer")
@document("POST", "/studies/{study_id}/data", "Upload a data version",
          request_schema="DataUpload", request_type="multipart/form-data", tags=("Data",),
          responses={201: ("The new data version", "DataVersion"),
                     400: ("The file or a field was refused; `problems` lists what is wrong "
                           "with the file, each naming its row and column", "Error"),
                     413: ("The file is over the size limit", "Error")})
def upload_data(study_id: int):
    """Checked exactly like an upload on the web page; nothing is stored when it is refused."""
    if request.mimetype != "multipart/form-data":
        raise WorkflowError(f"Send the upload as multipart/form-data (got "
                            f"'{request.mimetype or 'no Content-Type'}').",
                            field="Content-Type", status=415)
    try:
        file, form = request.files.get("file"), request.form
    except RequestEntityTooLarge:
        limit = format_size(int(current_app.config["MAX_UPLOAD_BYTES"]))
        raise WorkflowError(f"The upload is larger than the limit of {limit}.", field="file",
                            status=413) from None
    # A short read session: parsing a large file must not hold the write lock.
    with database().session(write=False) as s:
        studies.get_study(s, study_id)
    if file is None or not file.filename:
        raise WorkflowError("Field 'file' is required: the CSV or XLSX file.", field="file")
    plan, tolerance = _plan_fields(form, study_id)
    roles = (_roles_field(form.get("roles")) if plan is None or form.get("roles")
             else lambda columns: plans.roles_from_plan(plan, columns))
    data = file.read()
    try:
        raw, table = uploads.parse_upload(data, file.filename, roles,
                                          sheet=form.get("sheet") or None, **_limits())
    except UploadTooLarge as exc:
        return _refused_upload(exc, 413)
    except IngestError as exc:
        return _refused_upload(exc, 400)
    with tx() as s:
        version = uploads.add_data_version(
            s, me(s), studies.get_study(s, study_id), data=data, filename=file.filename,
            raw=raw, table=table, reason=form.get("reason"),
            plan=None if plan is None else plans.get_plan(s, plan.id), plan_tolerance=tolerance)
        out = {**_data_version(version),
               "plan_deviations": plans.deviations(s, version, table)}
    return _created(out, url_for("api.get_data", version_id=version.id))


def _plan_fields(form, study_id: int):
    """The upload's ``plan_id`` (a plan of this study) and ``tolerance`` (JSON: factor name to
    natural units) fields; (None, None) without a plan."""
    text = (form.get("plan_id") or "").strip()
    if not text:
        if form.get("tolerance"):
            raise WorkflowError("Field 'tolerance' needs a 'plan_id'.", field="tolerance")
        return None, None
    if not text.isdigit():
        raise WorkflowError(f"Field 'plan_id' must be a plan's id (got '{text}').",
                            field="plan_id")
    with database().session(write=False) as s:
        plan = plans.require_in_study(teams.plan_for(s, g.user, int(text)), study_id, text)
    tolerance = None
    if form.get("tolerance"):
        try:
            tolerance = json.loads(form["tolerance"])
        except ValueError as exc:
            raise WorkflowError(f"Field 'tolerance' is not valid JSON: {exc}.",
                                field="tolerance") from None
        if not isinstance(tolerance, dict):
            raise WorkflowError("Field 'tolerance' must map factor names to numbers.",
                                field="tolerance")
    return plan, tolerance


@bp.route("/data/<int:version_id>")
@allow(SIGNED_IN)
@document("GET", "/data/{version_id}", "A data version with its fits", tags=("Data",),
          responses={200: ("The data version", "DataVersion")})
def get_data(version_id: int):
    session = get_session()
    version = uploads.get_data_version(session, version_id)
    made = fits.fits_of_version(session, version.id)
    return jsonify({**_data_version(version), "fits": [_fit_summary(f) for f in made],
                    "plan_deviations": plans.deviations(session, version)})



AGAINST = {"name": "against", "in": "query", "required": False,
           "schema": {"type": "integer", "minimum": 1},
           "description": "The data version to compare with (same study); the previous version "
                          "when left out"}
KEY = {"type": ["string", "integer", "null"]}
CELL = {"type": ["string", "number", "null"]}
RUN_REF = {"type": "object", "required": ["key", "row"],
           "properties": {"key": KEY, "row": {"type": "integer"}}}
schema("DataDifferences", {
    "type": "object",
    "required": ["data_version", "against", "matched_by", "key_columns", "counts",
                 "changed_cells", "added_rows", "removed_rows", "columns_added",
                 "columns_removed", "roles_changed", "renamed"],
    "description": "What changed from the version compared with (`against`) to this one",
    "properties": {
        "data_version": {"type": "integer"},
        "against": {"type": ["integer", "null"],
                    "description": "null: this is the study's first version"},
        "matched_by": {"type": ["string", "null"], "enum": ["label", "run_order", "row", None],
                       "description": "How runs were paired: run label when both versions "
                                      "have unique labels, else run order, else row number"},
        "key_columns": {"type": "array", "items": {"type": ["string", "null"]}},
        "counts": {"type": "object", "additionalProperties": {"type": "integer"}},
        "changed_cells": {"type": "array", "items": {
            "type": "object", "required": ["key", "old_row", "new_row", "column", "old", "new"],
            "properties": {"key": KEY, "old_row": {"type": "integer"},
                           "new_row": {"type": "integer"}, "column": {"type": "string"},
                           "old": CELL, "new": CELL}}},
        "added_rows": {"type": "array", "items": RUN_REF},
        "removed_rows": {"type": "array", "items": RUN_REF},
        "columns_added": {"type": "array", "items": {"type": "string"}},
        "columns_removed": {"type": "array", "items": {"type": "string"}},
        "roles_changed": {"type": "array", "items": {
            "type": "object", "required": ["column", "old", "new"],
            "properties": {"column": {"type": "string"}, "old": ref("ColumnRole"),
                           "new": ref("ColumnRole")}}},
        "renamed": {"type": "array", "description": "A removed and an added column holding the "
                    "same values: likely one column renamed", "items": {
                        "type": "object", "required": ["old", "new"],
                        "properties": {"old": {"type": "string"}, "new": {"type": "string"}}}},
    }})


@bp.route("/data/<int:version_id>/diff")
@allow(SIGNED_IN)
@document("GET", "/data/{version_id}/diff", "Differences from another data version",
          tags=("Data",), parameters=(id_parameter("version_id"), AGAINST),
          responses={200: ("Changed cells, added and removed runs and columns",
                           "DataDifferences"),
                     400: ("against is not a number or belongs to another study",
                           ref("Error")),
                     404: ("No such data version", ref("Error"))})
def data_diff(version_id: int):
    session = get_session()
    version = uploads.get_data_version(session, version_id)
    against, diff = uploads.version_differences(
        session, version, id_field(request.args, "against", "data version"))
    empty = {"matched_by": None, "key_columns": [], "counts": {}, "changed_cells": [],
             "added_rows": [], "removed_rows": [], "columns_added": [], "columns_removed": [],
             "roles_changed": [], "renamed": []}
    return jsonify({"data_version": version.id, "against": against.id if against else None,
                    **(diff.to_dict() if diff else empty)})

def _fit_choices(body: dict[str, Any]) -> dict[str, Any]:
    """FitCreate fields as keyword arguments of fits.build_spec."""
    choices = dict(body)
    terms = choices.get("terms")
    if terms and choices.get("model") is not None:
        raise WorkflowError("Give either 'model' or 'terms', not both.", field="terms")
    choices["model"] = None if terms else choices.get("model", "linear")
    if choices["model"] is None and not terms:
        raise WorkflowError("Field 'model' is required when no 'terms' are given "
                            f"({', '.join(NAMED_MODELS)}).", field="model")
    excl = choices.get("exclusions")
    if isinstance(excl, list):
        rows = [item["row"] for item in excl]
        twice = sorted({int(r) for r in rows if rows.count(r) > 1})
        if twice:
            raise WorkflowError(f"Field 'exclusions' names row {twice[0]} more than once.",
                                field="exclusions")
        choices["exclusions"] = [(int(item["row"]), item["reason"]) for item in excl]
    return choices


@bp.route("/data/<int:version_id>/fits", methods=["POST"])
@allow("engineer")
@document("POST", "/data/{version_id}/fits", "Fit a model to a data version",
          request_schema="FitCreate", tags=("Fits",),
          responses={201: ("The new fit snapshot with its results; with 'responses', one fit "
                           "per response", {"oneOf": [ref("Fit"), ref("FitGroup")]})})
def create_fit(version_id: int):
    """The study's current thresholds are used and stored with the snapshot. With
    ``responses``, every fit is analysed first and all are stored in one transaction (each
    with its own event), or none."""
    body = json_body("FitCreate")
    several = body.pop("responses", None)
    if several is None and "response" not in body:
        raise WorkflowError("Field 'response' is required (or 'responses', a list, to fit "
                            "the same model to each).", field="response")
    if several is not None and "response" in body:
        raise WorkflowError("Give either 'response' or 'responses' (a list), not both.",
                            field="responses")
    if several is not None and len(set(several)) != len(several):
        raise WorkflowError("Field 'responses' names a response more than once.",
                            field="responses")
    choices = _fit_choices(body)
    asked = [choices.pop("response")] if several is None else list(several)
    with read_session() as rs:
        version = uploads.get_data_version(rs, version_id)
        planned = [fits.plan_fit(version, response=r, **choices) for r in asked]
    with tx() as s:
        version = uploads.get_data_version(s, version_id)
        made = [fits.create_fit(s, me(s), version, spec, results=results)
                for spec, results in planned]
        out = [_fit(fit) for fit in made]
    if several is None:
        return _created(out[0], url_for("api.get_fit", fit_id=made[0].id))
    return _created({"fits": out}, url_for("api.get_fit", fit_id=made[0].id))


@bp.route("/fits/<int:fit_id>")
@allow(SIGNED_IN)
@document("GET", "/fits/{fit_id}", "A fit snapshot: results document and hash", tags=("Fits",),
          responses={200: ("The fit", "Fit")})
def get_fit(fit_id: int):
    """``snapshot_intact`` is recomputed on every request from the stored snapshot."""
    return jsonify(_fit(fits.get_fit(get_session(), fit_id)))
