"""Sign-off through the JSON API: submit a fit, sign it (approve or return).

Errors are JSON ``{error, status, field}``: 409 for a step out of order or a lost race, 403 for
the signer's own fit, a missing role or a wrong password, 400 naming the field.
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, current_app, g, jsonify, request, url_for

from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.common import me, read_session, tx
from app.web.openapi import document, json_body, ref, schema
from app.workflow import fits, queue, reviews, signing

bp = Blueprint("api_reviews", __name__, url_prefix="/api/v1")

SHA256 = {"type": "string", "pattern": "^[0-9a-f]{64}$"}
schema("FitSubmit", {
    "type": "object", "additionalProperties": False,
    "properties": {"row_version": {"type": "integer", "minimum": 1,
                                   "description": "The version you looked at; 409 if it moved"}},
    "examples": [{"row_version": 1}],
})
schema("FitState", {
    "type": "object", "required": ["id", "state", "row_version"],
    "properties": {"id": {"type": "integer"}, "state": {"type": "string"},
                   "row_version": {"type": "integer"},
                   "submitted_at": {"type": ["string", "null"], "format": "date-time"}},
})
schema("SignatureCreate", {
    "type": "object", "additionalProperties": False, "required": ["meaning", "password"],
    "properties": {
        "meaning": {"type": "string", "enum": list(reviews.SIGN_MEANINGS)},
        "password": {"type": "string", "minLength": 1,
                     "description": "The signer's password, entered again to sign"},
        "comment": {"type": "string", "description": "Required when returning for rework"},
        "row_version": {"type": "integer", "minimum": 1,
                        "description": "The version you reviewed; 409 if it moved"},
    },
})
schema("Signature", {
    "type": "object",
    "required": ["id", "fit_id", "signer_id", "signer", "printed_name", "signed_at", "meaning",
                 "comment", "snapshot_sha256", "manifest_sha256", "status", "status_reason"],
    "properties": {
        "id": {"type": "integer"}, "fit_id": {"type": "integer"},
        "signer_id": {"type": "integer"},
        "signer": {"type": "string", "description": "The signer's user name"},
        "printed_name": {"type": "string"},
        "signed_at": {"type": "string", "format": "date-time", "description": "Server UTC"},
        "meaning": {"type": "string"}, "comment": {"type": "string"},
        "snapshot_sha256": SHA256, "manifest_sha256": SHA256,
        "status": {"type": "string", "enum": [reviews.VALID, reviews.INVALID,
                                              reviews.NOT_APPLYING]},
        "status_reason": {"type": "string"},
    },
})


schema("ReviewQueue", {
    "type": "object", "required": ["state", "fits"],
    "properties": {
        "state": {"type": "string", "enum": list(queue.REVIEW_STATES)},
        "fits": {"type": "array", "items": {
            "type": "object",
            "required": ["id", "study_id", "study", "response", "state", "submitted_at",
                         "submitted_by", "waiting_seconds", "may_sign", "why_not", "url"],
            "properties": {
                "id": {"type": "integer"}, "study_id": {"type": "integer"},
                "study": {"type": "string"}, "response": {"type": "string"},
                "state": {"type": "string"},
                "submitted_at": {"type": ["string", "null"], "format": "date-time"},
                "submitted_by": {"type": ["string", "null"],
                                 "description": "User name of the submitter"},
                "waiting_seconds": {"type": "number",
                                    "description": "Since submission (creation when never "
                                                   "submitted), by the server's clock"},
                "may_sign": {"type": "boolean",
                             "description": "Whether the caller may sign it now"},
                "why_not": {"type": ["string", "null"],
                            "description": "The signing rule that stops the caller"},
                "url": {"type": "string"}}}},
    },
})
STATE_QUERY = {"name": "state", "in": "query", "required": False,
               "schema": {"type": "string", "enum": list(queue.REVIEW_STATES),
                          "default": "submitted"},
               "description": "Fits in this state (submitted: the review queue)"}


@bp.route("/reviews")
@allow(SIGNED_IN)
@document("GET", "/reviews", "Fits awaiting review (or in another state), oldest first",
          tags=("Sign-off",), parameters=(STATE_QUERY,),
          responses={200: ("Fits the caller may read, with how long each has waited and "
                           "whether the caller may sign it", "ReviewQueue"),
                     400: ("An unknown state", ref("Error"))})
def queue_of_fits():
    state = request.args.get("state", "submitted")
    items = queue.fits_in_state(get_session(), g.user, state)
    return jsonify({"state": state, "fits": [{
        "id": i["fit"].id, "study_id": i["study"].id, "study": i["study"].title,
        "response": i["fit"].response, "state": i["fit"].state,
        "submitted_at": _when(i["fit"].submitted_at),
        "submitted_by": i["fit"].submitted_by.username if i["fit"].submitted_by else None,
        "waiting_seconds": round(i["waiting_seconds"], 3), "may_sign": i["may_sign"],
        "why_not": i["why_not"], "url": url_for("reviews.review", fit_id=i["fit"].id)}
        for i in items]})


def _when(when) -> str | None:
    return None if when is None else when.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _state(fit) -> dict[str, Any]:
    return {"id": fit.id, "state": fit.state, "row_version": fit.row_version,
            "submitted_at": _when(fit.submitted_at)}


@bp.route("/fits/<int:fit_id>/submit", methods=["POST"])
@allow("engineer")
@document("POST", "/fits/{fit_id}/submit", "Submit a draft fit for review",
          request_schema="FitSubmit", tags=("Sign-off",),
          responses={200: ("The fit, now submitted", ref("FitState")),
                     409: ("The fit is not a draft, or it changed", ref("Error"))})
def submit(fit_id: int):
    """Freezes the snapshot for review. A returned fit stays returned: make a new fit."""
    body = json_body("FitSubmit")
    with tx() as s:
        fit = fits.get_fit(s, fit_id)
        reviews.submit(s, me(s), fit, body.get("row_version"))
        out = _state(fit)
    return jsonify(out)


@bp.route("/fits/<int:fit_id>/signatures", methods=["POST"])
@allow("approver")
@document("POST", "/fits/{fit_id}/signatures", "Sign a submitted fit",
          request_schema="SignatureCreate", tags=("Sign-off",),
          responses={201: ("The signature", ref("Signature")),
                     409: ("The fit is not submitted, changed, or uses superseded data",
                           ref("Error"))})
def sign(fit_id: int):
    """Approve ("approved for setpoint use") or return ("returned for rework", with a comment).

    The password is checked again; a wrong one is refused with 403 and recorded in the audit
    trail, and five wrong passwords in a row lock signing for a while. Nobody signs a fit they
    made, submitted, or whose data version they uploaded; every refusal is recorded.
    """
    body = json_body("SignatureCreate")

    def act(s, actor, proof):
        fit = fits.get_fit(s, fit_id)
        sig = reviews.sign(s, actor, fit, meaning=body["meaning"], proof=proof,
                           comment=body.get("comment"),
                           expected_row_version=body.get("row_version"))
        return reviews.signature_json(fit, sig)

    out = signing.signed(read_session, tx, actor_id=g.user.id, password=body["password"],
                         attempt=reviews.attempt(fit_id, "sign"), act=act,
                         limits=signing.Lockout.from_config(current_app.config))
    response = jsonify(out)
    response.status_code = 201
    response.headers["Location"] = url_for("api.get_fit", fit_id=fit_id)
    return response
