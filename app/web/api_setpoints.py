"""Setpoints through the JSON API: propose from approved fits, read, sign (release for
confirmation, confirm for production, return, withdraw), confirmation runs, export.

Errors are JSON ``{error, status, field}``: 409 when a fit is not approved, its approval is
superseded, withdrawn, no longer applies or its signature is invalid, or when the request
leaves the design region; 403 for the author's own proposal, a missing role or a wrong
password; 400 naming the field.
"""

from __future__ import annotations

import json

from flask import Blueprint, current_app, g, jsonify, request, url_for
from werkzeug.exceptions import RequestEntityTooLarge

from app.analysis.optimize import CAUTION
from app.analysis.optimize.desirability import GOALS
from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, me, read_session, tx
from app.web.openapi import ID, Media, document, id_parameter, json_body, ref, schema
from app.workflow import (
    WorkflowError,
    confirmations,
    setpoint_export,
    setpoint_signoff,
    setpoints,
    signing,
    teams,
)

bp = Blueprint("api_setpoints", __name__, url_prefix="/api/v1")

NUMBER_OR_NULL = {"type": ["number", "null"]}
schema("SetpointGoal", {
    "type": "object", "additionalProperties": False, "required": ["goal"],
    "description": "Derringer–Suich desirability of one response (maximize, minimize, target), "
                   "or a limit to keep it within (within: a constraint on the search, not part "
                   "of D). The earlier fields low, high, importance and the goal in_range are "
                   "refused (400 naming the field and its new name).",
    "properties": {
        "goal": {"type": "string", "enum": list(GOALS)},
        "lower": {**NUMBER_OR_NULL,
                  "description": "Acceptable lower value: d = 0 at and below it when "
                                 "maximizing, d = 1 at and below it when minimizing; for "
                                 "within, the least value allowed. When omitted for maximize "
                                 "or minimize: the observed minimum, or the least prediction "
                                 "in the region when minimizing"},
        "upper": {**NUMBER_OR_NULL,
                  "description": "Acceptable upper value (mirror of lower). When omitted for "
                                 "maximize: the greatest prediction in the region; for "
                                 "minimize: the observed maximum"},
        "target": {**NUMBER_OR_NULL, "description": "Goal target only; lower < target < upper"},
        "shape": {"type": ["number", "array", "null"], "items": {"type": "number"},
                  "description": "Derringer–Suich shape exponent (default 1); [below, above] "
                                 "for a target"},
        "weight": {**NUMBER_OR_NULL,
                   "description": "Relative weight of this response in the overall "
                                  "desirability D = (prod d_i^w_i)^(1/sum w_i); default 1"},
        "spec": {"type": "object", "additionalProperties": False,
                 "properties": {"lower": NUMBER_OR_NULL, "upper": NUMBER_OR_NULL},
                 "description": "Specification limits for the design-space map (optional)"},
    },
})
schema("SetpointCreate", {
    "type": "object", "additionalProperties": False, "required": ["fits", "goals"],
    "properties": {
        "fits": {"type": "array", "minItems": 1, "items": ID,
                 "description": "Approved fit ids of one study, one per response"},
        "goals": {"type": "object", "additionalProperties": ref("SetpointGoal"),
                  "description": "Response name to its goal"},
        "bounds": {"type": "object", "additionalProperties": {
            "type": "array", "items": NUMBER_OR_NULL},
            "description": "Factor to [low, high] in natural units, inside the design region"},
        "fixed": {"type": "object",
                  "additionalProperties": {"oneOf": [{"type": "number"}, {"type": "string"}]},
                  "description": "Factor to a fixed value in natural units; a categorical "
                                 "factor to one of its level names (else every level is "
                                 "searched)"},
    },
    "examples": [{"fits": [1], "goals": {"Hardness": {"goal": "maximize"}}},
                 {"fits": [1, 2], "goals": {
                     "Hardness": {"goal": "target", "lower": 120, "target": 128, "upper": 134,
                                  "shape": [1, 2], "weight": 2},
                     "Gloss": {"goal": "within", "lower": 85}}}],
})
schema("SetpointSignature", {
    "type": "object", "additionalProperties": False, "required": ["meaning", "password"],
    "properties": {
        "meaning": {"type": "string", "enum": list(setpoint_signoff.MEANINGS),
                    "description": "Selects the transition: 'released for confirmation' "
                                   "(from proposed), 'confirmed for production' (from "
                                   "released, after confirmation runs passed), 'returned' "
                                   "(from proposed, with a comment), 'withdrawn' (from "
                                   "released, confirmation failed or confirmed, with a "
                                   "comment)"},
        "password": {"type": "string", "minLength": 1,
                     "description": "The signer's password, entered again to sign"},
        "comment": {"type": "string",
                    "description": "Required (the reasons) to return or withdraw"},
        "tolerance": {"type": "object", "additionalProperties": {"type": "number",
                                                                 "minimum": 0},
                      "description": "Release only: factor to the largest deviation (natural "
                                     "units) a confirmation run's setting may have from the "
                                     "released one; 2 % of the studied range when omitted"},
        "row_version": {"type": "integer", "minimum": 1,
                        "description": "The version you looked at; 409 if it moved"},
    },
})
schema("ConfirmationUpload", {
    "type": "object", "required": ["file"],
    "properties": {
        "file": {"type": "string", "contentMediaType": "application/octet-stream",
                 "description": "CSV or XLSX: one row per confirmation run, a column per "
                                "response, and a column per factor with the settings run"},
    },
})
schema("SetpointSheet", {
    "type": "object",
    "required": ["caution", "setpoint_id", "state", "snapshot_sha256", "fits", "optimum",
                 "signatures", "confirmations", "chain_head"],
    "properties": {
        "caution": {"type": "string", "const": CAUTION},
        "setpoint_id": {"type": "integer"}, "study_id": {"type": "integer"},
        "state": {"type": "string", "enum": list(setpoint_signoff.STATE_LABELS)},
        "state_label": {"type": "string", "enum": list(setpoint_signoff.STATE_LABELS.values())},
        "for_production": {"type": "boolean",
                           "description": "True only when confirmed for production"},
        "snapshot_sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
        "snapshot_intact": {"type": "boolean"},
        "fits": {"type": "array", "items": {"type": "object"}},
        "goals": {"type": "object"},
        "optimum": {"type": "object", "description": "coded, settings, predicted, ci, pi, "
                                                     "desirability (the overall desirability "
                                                     "D), individual_desirability, gradient"},
        "constraints": {"type": "object",
                        "description": "Each response kept within limits (goal within): "
                                       "lower, upper, predicted, met"},
        "stationary_point": {"type": "object"},
        "levels": {"type": ["object", "null"],
                   "description": "With categorical factors: chosen {factor: level}, "
                                  "held {factor: level} (the levels the request fixed), "
                                  "statement, factors, and by_level (each combination's "
                                  "best settings, predictions and D); null without them"},
        "edge": {"type": ["object", "null"],
                 "description": "When the proposal sits on the boundary of the region "
                                "searched and a goal asks for more: shape (cube or sphere), "
                                "factors [{factor, side, setting}] (cube) and note; else null"},
        "held": {"type": "array", "items": {"type": "string"},
                 "description": "Factors the request fixed (at a value or a level)"},
        "signatures": {"type": "array", "items": {"type": "object"}},
        "confirmations": {"type": "array", "items": {"type": "object"}},
        "chain_head": {"type": "object"},
    },
})
GUARDS = ("A fit is not approved, its approval was superseded, withdrawn or no longer applies, "
          "its signature is invalid, or the request leaves the design region")


def _sheet(proposal_id: int) -> dict:
    session = get_session()
    return setpoint_export.export_json(session, setpoints.get_proposal(session, proposal_id))


@bp.route("/setpoints", methods=["POST"])
@allow("engineer")
@document("POST", "/setpoints", "Propose setpoints from approved fits",
          request_schema="SetpointCreate", tags=("Setpoints",),
          responses={201: ("The stored draft proposal", ref("SetpointSheet")),
                     404: ("A fit named in `fits` does not exist", ref("Error")),
                     409: (GUARDS, ref("Error"))})
def create():
    """Searches the design region (cube, or sphere of a rotatable design) for the settings
    with the highest overall desirability D, keeping any response given goal 'within' inside
    its limits; bounds and fixed values are in natural units."""
    raw = request.get_json(silent=True)
    if isinstance(raw, dict):
        # earlier goal words get their new name before the schema calls them unknown
        setpoints.refuse_renamed(raw.get("goals"))
    body = json_body("SetpointCreate")
    with tx() as s:
        chosen = [teams.fit_for(s, g.user, i) for i in body["fits"]]
        proposal = setpoints.propose(s, me(s), chosen, body["goals"], body.get("bounds"),
                                     body.get("fixed"))
        proposal_id = proposal.id
        out = setpoint_export.export_json(s, proposal)
    response = jsonify({"id": proposal_id, **out})
    response.status_code = 201
    response.headers["Location"] = url_for("api_setpoints.get", proposal_id=proposal_id)
    return response


@bp.route("/setpoints/<int:proposal_id>")
@allow(SIGNED_IN)
@document("GET", "/setpoints/{proposal_id}", "A setpoint sheet with its signatures",
          tags=("Setpoints",), responses={200: ("The setpoint sheet", ref("SetpointSheet"))})
def get(proposal_id: int):
    return jsonify({"id": proposal_id, **_sheet(proposal_id)})


@bp.route("/setpoints/<int:proposal_id>/signatures", methods=["POST"])
@allow("approver")
@document("POST", "/setpoints/{proposal_id}/signatures",
          "Sign the setpoint sheet: release for confirmation, confirm for production, return "
          "or withdraw", request_schema="SetpointSignature", tags=("Setpoints",),
          responses={201: ("The signature", {"type": "object"}),
                     409: ("Not in a state the meaning starts from, changed meanwhile, "
                           "confirmation runs missing or not passed, or "
                           + GUARDS[0].lower() + GUARDS[1:], ref("Error"))})
def release(proposal_id: int):
    """The password is checked again; a wrong one is refused with 403 and recorded, and five
    wrong passwords in a row lock signing for a while. Nobody signs a sheet they proposed or
    one that uses a fit they made; every refusal is recorded."""
    body = json_body("SetpointSignature")
    meaning = body["meaning"]

    def act(s, actor, proof):
        proposal = setpoints.get_proposal(s, proposal_id)
        tolerance = body.get("tolerance")
        if meaning == setpoint_signoff.RELEASE and tolerance is None:
            tolerance = setpoints.default_tolerance(s, proposal)
        sig = setpoint_signoff.sign(s, actor, proposal, proof=proof, meaning=meaning,
                                    comment=body.get("comment"), tolerance=tolerance,
                                    expected_row_version=body.get("row_version"))
        return {**setpoints.signature_json(s, proposal, sig), "state": proposal.state,
                "state_label": setpoint_signoff.state_label(proposal.state)}

    out = signing.signed(read_session, tx, actor_id=g.user.id, password=body["password"],
                         attempt=setpoint_signoff.attempt(proposal_id, meaning), act=act,
                         limits=signing.Lockout.from_config(current_app.config))
    response = jsonify(out)
    response.status_code = 201
    response.headers["Location"] = url_for("api_setpoints.get", proposal_id=proposal_id)
    return response


@bp.route("/setpoints/<int:proposal_id>/confirmations", methods=["POST"])
@allow("engineer")
@document("POST", "/setpoints/{proposal_id}/confirmations", "Upload confirmation runs",
          request_schema="ConfirmationUpload", request_type="multipart/form-data",
          tags=("Setpoints",),
          responses={201: ("The stored runs with the verdict", {"type": "object"}),
                     400: ("The file was refused, naming the row and column", ref("Error")),
                     409: ("Not released for confirmation, or a setting run lies beyond the "
                           "tolerance set at release", ref("Error")),
                     413: ("The file is over the size limit", ref("Error"))})
def confirmations_upload(proposal_id: int):
    """Judged as on the setpoint sheet; a failed verdict moves the proposal to "confirmation
    failed"."""
    if request.mimetype != "multipart/form-data":
        raise WorkflowError(f"Send the file as multipart/form-data (got "
                            f"'{request.mimetype or 'no Content-Type'}').",
                            field="Content-Type", status=415)
    cfg = current_app.config
    try:
        file = request.files.get("file")
    except RequestEntityTooLarge:
        raise WorkflowError("The upload is larger than the limit.", field="file",
                            status=413) from None
    with read_session() as s:
        setpoints.get_proposal(s, proposal_id)  # 404 before the file is looked at
    if file is None or not file.filename:
        raise WorkflowError("Field 'file' is required: the CSV or XLSX file of confirmation "
                            "runs.", field="file")
    data = file.read()
    try:
        raw = confirmations.read_file(data, file.filename,
                                      max_bytes=int(cfg["MAX_UPLOAD_BYTES"]),
                                      max_cells=int(cfg["MAX_UPLOAD_CELLS"]))
        with tx() as s:
            proposal = setpoints.get_proposal(s, proposal_id)
            run = confirmations.record(s, me(s), proposal, data=data, filename=file.filename,
                                       raw=raw)
            out = {"id": run.id, "setpoint_id": proposal.id, "filename": run.filename,
                   "original_sha256": run.original_sha256, "state": proposal.state,
                   "state_label": setpoint_signoff.state_label(proposal.state),
                   **confirmations.results_of(run)}
    except WorkflowError as exc:
        if exc.status != 404:
            with tx() as s:
                confirmations.record_refusal(s, me(s), proposal_id, file.filename, exc)
        raise
    response = jsonify(out)
    response.status_code = 201
    response.headers["Location"] = url_for("api_setpoints.get", proposal_id=proposal_id)
    return response


@bp.route("/setpoints/<int:proposal_id>/export")
@allow(SIGNED_IN)
@document("GET", "/setpoints/{proposal_id}/export", "Export the setpoint sheet",
          tags=("Setpoints",),
          parameters=(id_parameter("proposal_id"),
                      {"name": "format", "in": "query", "required": False,
                       "schema": {"type": "string", "enum": ["json", "csv"]}}),
          responses={200: ("The sheet as an attachment (JSON, or CSV with format=csv)",
                           Media({"application/json": ref("SetpointSheet"),
                                  "text/csv": {"type": "string"}})),
                     400: ("`format` is neither json nor csv", ref("Error"))})
def export(proposal_id: int):
    """Carries fit ids, snapshot hashes, signatures, the chain head and the caution text."""
    kind = request.args.get("format", "json")
    if kind not in ("json", "csv"):
        raise WorkflowError("format must be json or csv.", field="format")
    session = get_session()
    proposal = setpoints.get_proposal(session, proposal_id)
    if kind == "csv":
        body, mimetype = setpoint_export.export_csv(session, proposal), "text/csv"
    else:
        body = json.dumps(setpoint_export.export_json(session, proposal), indent=2,
                          ensure_ascii=False).encode()
        mimetype = "application/json"
    return attachment(body, f"setpoints_{proposal_id}.{kind}", mimetype)
