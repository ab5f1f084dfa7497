"""Plans through the API: build one in a study, read it, download its run sheet.

``POST /api/v1/studies/{id}/plans`` builds, evaluates and stores a plan (an engineer on the
study's team); the run sheet comes as CSV or XLSX. Uploads name their plan with the ``plan_id``
field of ``POST /api/v1/studies/{id}/data`` (app.web.api).
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, jsonify, url_for

from app.store.db import get_session
from app.store.models import Plan
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, me, tx
from app.web.openapi import Media, document, id_parameter, json_body, ref, schema
from app.workflow import plans, studies

bp = Blueprint("api_plans", __name__, url_prefix="/api/v1")

DESIGNS = ("full_factorial", "fractional_factorial", "central_composite", "box_behnken")
schema("PlanCreate", {
    "type": "object", "additionalProperties": False, "required": ["design", "factors"],
    "properties": {
        "design": {"type": "string", "enum": list(DESIGNS)},
        "factors": {"type": "array", "minItems": 2, "items": {
            "type": "object", "additionalProperties": False, "required": ["name"],
            "description": "A continuous factor: name, low, high (natural units), units. A "
                           "categorical one (supplier, machine): name and levels; the design "
                           "of the continuous factors is run at every combination of levels.",
            "properties": {"name": {"type": "string", "minLength": 1},
                           "low": {"type": "number"}, "high": {"type": "number"},
                           "units": {"type": ["string", "null"]},
                           "levels": {"type": "array", "minItems": 2,
                                      "items": {"type": "string", "minLength": 1}}}}},
        "runs": {"type": "integer", "minimum": 4,
                 "description": "Fractional factorials: the number of factorial runs"},
        "centre_points": {"type": "integer", "minimum": 0},
        "axial": {"type": "string",
                  "enum": ["rotatable", "face_centred", "inscribed", "orthogonal"],
                  "description": "Central composite designs: where the axial runs go"},
        "blocks": {"type": "integer", "minimum": 1},
        "replicates": {"type": "integer", "minimum": 1},
        "seed": {"type": "integer", "minimum": 0,
                 "description": "Seed of the randomised run order (drawn when omitted)"},
        "generators": {"type": "array", "items": {"type": "string"},
                       "description": "Fractional factorials: generators in place of the "
                                      "published choice, e.g. \"E = A:B:C:D\""},
        "responses": {"type": "array", "items": {"type": "string", "minLength": 1},
                      "description": "Blank response columns of the run sheet"},
        "model": {"type": "string", "enum": ["linear", "interaction", "quadratic"],
                  "description": "The model the evaluation assumes"},
        "effect": {"type": "number", "exclusiveMinimum": 0,
                   "description": "Effect to detect (low to high, response units) for power"},
        "sigma": {"type": "number", "exclusiveMinimum": 0,
                  "description": "Noise SD (response units) for power"},
    },
    "examples": [{"design": "central_composite", "axial": "rotatable", "centre_points": 6,
                  "factors": [{"name": "Temperature", "low": 150, "high": 170, "units": "°C"},
                              {"name": "Time", "low": 20, "high": 30, "units": "min"}],
                  "responses": ["Hardness"], "seed": 20261203}],
})
schema("Plan", {
    "type": "object",
    "required": ["id", "study_id", "design", "seed", "sha256", "plan_intact", "factors", "runs",
                 "evaluation", "request", "created_at", "sheet_csv"],
    "properties": {
        "id": {"type": "integer"}, "study_id": {"type": "integer"},
        "design": {"type": "string"}, "seed": {"type": "integer"},
        "sha256": {"type": "string"}, "plan_intact": {"type": "boolean"},
        "factors": {"type": "array", "items": {"type": "object"}},
        "runs": {"type": "array", "items": {
            "type": "object", "required": ["run_order", "label", "settings"],
            "properties": {"run_order": {"type": "integer"}, "label": {"type": "string"},
                           "settings": {"type": "object"}}}},
        "evaluation": {"type": "object"}, "request": {"type": "object"},
        "created_at": {"type": "string", "format": "date-time"},
        "sheet_csv": {"type": "string"},
    },
})


def plan_json(plan: Plan) -> dict[str, Any]:
    built = plans.document(plan)
    return {**built, "id": plan.id, "study_id": plan.study_id, "sha256": plan.sha256,
            "plan_intact": plans.plan_intact(plan), "evaluation": plans.evaluation_of(plan),
            "request": plans.request_of(plan),
            "created_at": plan.created_at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "sheet_csv": url_for("api_plans.sheet_csv", plan_id=plan.id)}


@bp.route("/studies/<int:study_id>/plans", methods=["POST"])
@allow("engineer")
@document("POST", "/studies/{study_id}/plans", "Build, evaluate and store a plan",
          request_schema="PlanCreate", tags=("Plans",), parameters=(id_parameter("study_id"),),
          responses={201: ("The plan with its randomised runs and evaluation", "Plan"),
                     400: ("A field the design cannot take, named", ref("Error"))})
def create(study_id: int):
    body = json_body("PlanCreate")
    with tx() as s:
        plan = plans.create_plan(s, me(s), studies.get_study(s, study_id), body)
        out = plan_json(plan)
    response = jsonify(out)
    response.status_code = 201
    response.headers["Location"] = url_for("api_plans.get", plan_id=out["id"])
    return response


@bp.route("/plans/<int:plan_id>")
@allow(SIGNED_IN)
@document("GET", "/plans/{plan_id}", "A plan", tags=("Plans",),
          parameters=(id_parameter("plan_id"),), responses={200: ("The plan", "Plan")})
def get(plan_id: int):
    return jsonify(plan_json(plans.get_plan(get_session(), plan_id)))


@bp.route("/plans/<int:plan_id>/sheet.csv")
@allow(SIGNED_IN)
@document("GET", "/plans/{plan_id}/sheet.csv", "A plan's run sheet as CSV", tags=("Plans",),
          parameters=(id_parameter("plan_id"),),
          responses={200: ("Run order, run label, settings in natural units, blank responses",
                           Media({"text/csv": {"type": "string"}}))})
def sheet_csv(plan_id: int) -> Response:
    plan = plans.get_plan(get_session(), plan_id)
    return attachment(plans.sheet_csv(plan), f"plan-{plan.id}-run-sheet.csv", "text/csv")


@bp.route("/plans/<int:plan_id>/sheet.xlsx")
@allow(SIGNED_IN)
@document("GET", "/plans/{plan_id}/sheet.xlsx", "A plan's run sheet as XLSX", tags=("Plans",),
          parameters=(id_parameter("plan_id"),),
          responses={200: ("The run sheet as a workbook", Media({
              "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet": {
                  "type": "string", "format": "binary"}}))})
def sheet_xlsx(plan_id: int) -> Response:
    plan = plans.get_plan(get_session(), plan_id)
    return attachment(plans.sheet_xlsx(plan), f"plan-{plan.id}-run-sheet.xlsx",
                      "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet")
