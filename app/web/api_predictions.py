"""Predictions at chosen settings through the API (``POST /api/v1/fits/{id}/predictions``).

A POST because the settings are a body, but a read: nothing is stored, and a read-scope token
may ask it (``reads_only``).
"""

from __future__ import annotations

from flask import Blueprint, jsonify

from app.analysis.profiler import MAX_SETTINGS
from app.store.db import get_session
from app.web.access import SIGNED_IN, allow, reads_only
from app.web.openapi import document, id_parameter, json_body, ref, schema
from app.workflow import fits, predictions

bp = Blueprint("api_predictions", __name__, url_prefix="/api/v1")

SETTING = {"type": "object", "minProperties": 1,
           "additionalProperties": {"type": ["number", "string"]},
           "description": "Factor name to its value in natural units (a level name for a "
                          "categorical factor), one for every factor"}
INTERVAL = {"type": "array", "items": {"type": ["number", "null"]}, "minItems": 2, "maxItems": 2}
schema("PredictionRequest", {
    "type": "object", "additionalProperties": False, "required": ["settings"],
    "properties": {
        "settings": {"type": "array", "minItems": 1, "maxItems": MAX_SETTINGS,
                     "items": SETTING},
        "level": {"type": "number", "minimum": 0.5, "exclusiveMaximum": 1,
                  "description": "Confidence level of both intervals (0.95)"},
    },
    "examples": [{"settings": [{"Temperature": 185, "Time": 12, "Catalyst": 0.5}]}],
})
schema("Predictions", {
    "type": "object",
    "required": ["fit", "snapshot_sha256", "snapshot_intact", "response", "level", "scale",
                 "region", "predictions", "caution"],
    "properties": {
        "fit": {"type": "integer"}, "snapshot_sha256": {"type": "string"},
        "snapshot_intact": {"type": "boolean"}, "response": {"type": "string"},
        "level": {"type": "number"},
        "scale": {"type": ["string", "null"],
                  "description": "How values were transformed back (null without a transform)"},
        "region": {"type": "object", "description": "The design region: shape, radius, why"},
        "caution": {"type": "string"},
        "predictions": {"type": "array", "items": {
            "type": "object",
            "required": ["settings", "predicted", "ci", "pi", "inside_design_region"],
            "properties": {
                "settings": {"type": "object"}, "coded": {"type": "object"},
                "predicted": {"type": ["number", "null"]},
                "ci": {**INTERVAL, "description": "Confidence interval for the mean"},
                "pi": {**INTERVAL, "description": "Prediction interval for one new run"},
                "inside_design_region": {"type": "boolean"}}}},
    },
})


@bp.route("/fits/<int:fit_id>/predictions", methods=["POST"])
@allow(SIGNED_IN)
@reads_only
@document("POST", "/fits/{fit_id}/predictions", "Predictions at chosen settings",
          tags=("Fits",), request_schema="PredictionRequest",
          parameters=(id_parameter("fit_id"),),
          responses={200: ("The predicted value, confidence and prediction intervals at each "
                           "setting, back-transformed where the fit used a transform",
                           "Predictions"),
                     400: ("A setting that names no factor, lacks one or is not a number",
                           ref("Error"))})
def create(fit_id: int):
    body = json_body("PredictionRequest")
    fit = fits.get_fit(get_session(), fit_id)
    return jsonify(predictions.predictions(fit, body["settings"], body.get("level")))
