"""Plans in the browser: the form that builds one, and the plan page with its evaluation, run
sheet and downloads. Uploads against a plan are chosen on the upload page (app.web.data)."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, current_app, flash, g, redirect, render_template, request, url_for

from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, me, tx
from app.workflow import WorkflowError, plans, report, studies

bp = Blueprint("plans", __name__)

DESIGN_WORDS = {"full_factorial": "Two-level full factorial",
                "fractional_factorial": "Two-level fractional factorial",
                "central_composite": "Central composite", "box_behnken": "Box–Behnken"}
AXIAL_WORDS = {"rotatable": "Rotatable", "face_centred": "Face-centred",
               "inscribed": "Inscribed", "orthogonal": "Orthogonally blocked"}
FACTOR_ROWS = 7


def _whole(form, name: str) -> int | None:
    text = (form.get(name) or "").strip()
    if not text:
        return None
    if not text.isdigit():
        raise WorkflowError(f"'{name.replace('_', ' ')}' must be a whole number (got '{text}').",
                            field=name)
    return int(text)


def _number(form, name: str) -> float | None:
    text = (form.get(name) or "").strip().replace(",", ".")
    if not text:
        return None
    try:
        return float(text)
    except ValueError:
        raise WorkflowError(f"'{name}' must be a number (got '{text}').", field=name) from None


def request_from_form(form) -> dict[str, Any]:
    """The plan request (as the API takes it) from the form's fields."""
    factors = []
    for i in range(FACTOR_ROWS):
        name = (form.get(f"name_{i}") or "").strip()
        if not name:
            continue
        levels = [v.strip() for v in (form.get(f"levels_{i}") or "").split(",") if v.strip()]
        if levels:  # a categorical factor: the design is crossed with its levels
            factors.append({"name": name, "levels": levels})
            continue
        factors.append({"name": name, "low": _number(form, f"low_{i}"),
                        "high": _number(form, f"high_{i}"),
                        "units": (form.get(f"units_{i}") or "").strip() or None})
    body: dict[str, Any] = {"design": form.get("design"), "factors": factors}
    for name in ("runs", "centre_points", "blocks", "replicates", "seed"):
        value = _whole(form, name)
        if value is not None:
            body[name] = value
    if form.get("design") == "central_composite" and form.get("axial"):
        body["axial"] = form.get("axial")
    responses = [r.strip() for r in (form.get("responses") or "").split(",") if r.strip()]
    if responses:
        body["responses"] = responses
    for name in ("effect", "sigma"):
        value = _number(form, name)
        if value is not None:
            body[name] = value
    if form.get("model"):
        body["model"] = form.get("model")
    return body


def _form_page(study, form, error=None, field=None, status=200):
    return render_template("plans/new.html", study=study, form=form, error=error, field=field,
                           designs=DESIGN_WORDS, axials=AXIAL_WORDS,
                           rows=range(FACTOR_ROWS)), status


@bp.route("/studies/<int:study_id>/plans/new", methods=["GET", "POST"])
@allow("engineer")
def create(study_id: int):
    study = studies.get_study(get_session(), study_id)
    if request.method == "GET":
        return _form_page(study, {"design": "central_composite", "axial": "rotatable",
                                  "replicates": "1"})
    form = request.form
    try:
        body = request_from_form(form)
        with tx() as s:
            plan = plans.create_plan(s, me(s), studies.get_study(s, study_id), body)
    except WorkflowError as exc:
        return _form_page(study, form, exc.message, exc.field, 400)
    flash(f"Plan {plan.id} stored: {len(plans.document(plan)['runs'])} runs in random order "
          f"(seed {plans.document(plan)['seed']}).")
    return redirect(url_for("plans.view", plan_id=plan.id))


@bp.route("/plans/<int:plan_id>")
@allow(SIGNED_IN)
def view(plan_id: int):
    plan = plans.get_plan(get_session(), plan_id)
    header, rows = plans.sheet_rows(plan)
    return render_template("plans/view.html", plan=plan, study=plan.study,
                           built=plans.document(plan), evaluation=plans.evaluation_of(plan),
                           request_doc=plans.request_of(plan), header=header, rows=rows,
                           intact=plans.plan_intact(plan), designs=DESIGN_WORDS)


@bp.route("/plans/<int:plan_id>/sheet.csv")
@allow(SIGNED_IN)
def sheet_csv(plan_id: int):
    plan = plans.get_plan(get_session(), plan_id)
    return attachment(plans.sheet_csv(plan), f"plan-{plan.id}-run-sheet.csv", "text/csv")


@bp.route("/plans/<int:plan_id>/sheet.pdf")
@allow(SIGNED_IN)
def sheet_pdf(plan_id: int):
    plan = plans.get_plan(get_session(), plan_id)
    data = report.plan_sheet(get_session(), plan,
                             software_version=current_app.config.get("SOFTWARE_VERSION") or "",
                             printed_by=g.user.full_name)
    return attachment(data, f"plan-{plan.id}-run-sheet.pdf", report.PDF)
