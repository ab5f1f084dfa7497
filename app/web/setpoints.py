"""Setpoint pages: propose from approved fits, the setpoint sheet, design-space map, the
sign-off (release for confirmation, confirm for production, return, withdraw), confirmation
runs, exports. Refusals answer with the page, the plain message and its status
(409 for the guards, 403 for the signer's own proposal or a wrong password)."""

from __future__ import annotations

import json
from typing import Any

from flask import (
    Blueprint,
    current_app,
    flash,
    g,
    redirect,
    render_template,
    request,
    url_for,
)
from sqlalchemy import select

from app.analysis.optimize import CAUTION, SetpointError, design_space
from app.store.db import get_session
from app.store.models import Fit
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, me, parse_id, read_session, tx
from app.web.setpoint_charts import design_space_chart
from app.workflow import (
    WorkflowError,
    confirmations,
    fits,
    setpoint_export,
    setpoint_signoff,
    setpoints,
    signing,
    studies,
    teams,
)

bp = Blueprint("setpoints", __name__)

# (form value, words shown): the goal values are the API's (app.analysis.optimize.desirability)
GOAL_CHOICES = (("maximize", "be as high as possible"), ("minimize", "be as low as possible"),
                ("target", "hit"), ("within", "stay within limits (not part of D)"),
                ("none", "only be predicted"))
# form field (without the _<fit id> suffix) -> (goal key, words for an error message)
GOAL_INPUTS = (("lower", "lower", "Acceptable lower value"),
               ("upper", "upper", "Acceptable upper value"),
               ("target", "target", "Target"), ("shape", "shape", "Shape"),
               ("weight", "weight", "Weight in D"))


@bp.app_template_global("setpoint_proposals")
def setpoint_proposals(study_id: int) -> list:
    """The study's setpoint proposals, newest first (for templates/setpoints/_study_link.html)."""
    return setpoints.proposals_of_study(get_session(), study_id)


bp.add_app_template_global(setpoint_signoff.state_label, "setpoint_state_label")


@bp.app_template_global("may_propose_setpoints")
def may_propose_setpoints(study_id: int) -> bool:
    """Whether the study has an approved fit (the study page's button): its state, one row
    read, as the audit trail records it; the form checks each fit's signatures in full."""
    return setpoints.has_approved_fit(get_session(), study_id)


bp.add_app_template_global(setpoint_export.goal_words, "goal_words")


# ---- proposing -------------------------------------------------------------------------------

def _candidates(session, study_id: int) -> list[dict[str, Any]]:
    """Every fit of the study with the reason it may not drive setpoints (None when it may)."""
    rows = session.scalars(select(Fit).where(Fit.study_id == study_id).order_by(Fit.id.desc()))
    return [{"fit": f, "problem": setpoints.fit_problem(f)} for f in rows]


def _factors(candidates: list[dict[str, Any]]) -> list[dict[str, Any]]:
    for c in candidates:
        if c["problem"] is None:
            return fits.results_of(c["fit"])["model"]["factors"]
    return []


def _number(form, name: str, label: str) -> float | None:
    raw = (form.get(name) or "").strip()
    if not raw:
        return None
    try:
        return float(raw.replace(",", "."))
    except ValueError:
        raise WorkflowError(f"{label} must be a number (got '{raw}').", field=name) from None


def parse_proposal_form(form, factors: list[dict[str, Any]]) -> dict[str, Any]:
    """Fit ids, goals (with spec limits), bounds and fixed values from the proposal form.

    Per fit: ``goal_<id>`` (a value of :data:`GOAL_CHOICES`), ``lower_<id>``, ``upper_<id>``,
    ``target_<id>``, ``shape_<id>`` (and ``shape_above_<id>`` for a target's other side),
    ``weight_<id>``, ``spec_lower_<id>``, ``spec_upper_<id>``: the API's goal keys, so a form
    and an API request with the same values propose the same settings."""
    chosen = [parse_id(raw, "fit", "fit") for raw in form.getlist("fit")]
    if not chosen:
        raise WorkflowError("Tick at least one approved fit.", field="fit")
    chosen.sort()
    goals: dict[int, dict[str, Any]] = {}
    for fit_id in chosen:
        goal = form.get(f"goal_{fit_id}", "none")
        if goal == "none":
            continue
        spec: dict[str, Any] = {"goal": goal}
        for name, key, label in GOAL_INPUTS:
            value = _number(form, f"{name}_{fit_id}", f"{label} of fit {fit_id}")
            if value is not None:
                spec[key] = value
        above = _number(form, f"shape_above_{fit_id}", f"Shape above the target of fit {fit_id}")
        if above is not None:
            if goal != "target":
                raise WorkflowError(f"Shape above the target of fit {fit_id} is only used with "
                                    "a target.", field=f"shape_above_{fit_id}")
            spec["shape"] = [spec.get("shape", 1.0), above]
        limits = {k: _number(form, f"spec_{k}_{fit_id}", f"Specification {k} limit of fit "
                             f"{fit_id}") for k in ("lower", "upper")}
        if any(v is not None for v in limits.values()):
            spec["spec"] = limits
        goals[fit_id] = spec
    bounds, fixed = {}, {}
    for j, factor in enumerate(factors):
        name = factor["name"]
        if factor.get("levels") is not None:
            level = (form.get(f"fixed_{j}") or "").strip()
            if level:
                fixed[name] = level     # checked against the levels by the search
            continue
        value = _number(form, f"fixed_{j}", f"Fixed value of {name}")
        if value is not None:
            fixed[name] = value
        low = _number(form, f"bound_low_{j}", f"Lower bound of {name}")
        high = _number(form, f"bound_high_{j}", f"Upper bound of {name}")
        if low is not None or high is not None:
            bounds[name] = [low, high]
    return {"fit_ids": chosen, "goals": goals, "bounds": bounds, "fixed": fixed}


def _form_page(study_id: int, form=None, error: str | None = None, field: str | None = None,
               status: int = 200):
    session = get_session()
    study = studies.get_study(session, study_id)
    candidates = _candidates(session, study_id)
    usable = [str(c["fit"].id) for c in candidates if c["problem"] is None]
    # the first visit offers the only usable fit ticked; after a refusal, what was sent
    chosen = form.getlist("fit") if form is not None else usable if len(usable) == 1 else []
    return render_template("setpoints/new.html", study=study, candidates=candidates,
                           factors=_factors(candidates), goal_choices=GOAL_CHOICES,
                           form=form or {}, error=error, error_field=field, chosen=chosen,
                           caution=CAUTION), status


@bp.route("/studies/<int:study_id>/setpoints/new", methods=["GET", "POST"])
@allow("engineer")
def new(study_id: int):
    if request.method == "GET":
        return _form_page(study_id)
    try:
        factors = _factors(_candidates(get_session(), study_id))
        parsed = parse_proposal_form(request.form, factors)
        with tx() as s:
            studies.get_study(s, study_id)
            chosen = [teams.fit_for(s, g.user, i) for i in parsed["fit_ids"]]
            if any(f.study_id != study_id for f in chosen):
                raise WorkflowError("Every fit must belong to this study.", field="fit")
            by_fit = {f.id: f.response for f in chosen}
            goals = {by_fit[i]: g for i, g in parsed["goals"].items()}
            proposal = setpoints.propose(s, me(s), chosen, goals, parsed["bounds"],
                                         parsed["fixed"])
            proposal_id = proposal.id
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        get_session().rollback()
        return _form_page(study_id, request.form, exc.message, exc.field, exc.status)
    flash(f"Setpoint proposal {proposal_id} stored as proposed; an approver releases it.")
    return redirect(url_for("setpoints.view", proposal_id=proposal_id))


# ---- the setpoint sheet ----------------------------------------------------------------------

def sheet_context(session, proposal) -> dict[str, Any]:
    result = setpoints.result_of(proposal)
    chosen = setpoints.fits_of(session, proposal)
    units = {f["name"]: f.get("units") for f in
             fits.results_of(chosen[0])["model"]["factors"]} if chosen else {}
    sigs = setpoints.release_signatures(session, proposal)
    return {
        "proposal": proposal, "study": proposal.study, "result": result,
        "optimum": result["optimum"], "goals": setpoints.goals_of(proposal),
        "fits": [{"fit": f, "problem": setpoints.fit_problem(f)} for f in chosen],
        "units": units, "caution": CAUTION,
        "intact": setpoints.proposal_intact(session, proposal),
        "signatures": [(s, setpoints.signature_check(session, proposal, s)) for s in sigs],
        "confirmations": [(run, confirmations.results_of(run))
                          for run in proposal.confirmations],
        "meanings": setpoint_signoff.MEANINGS,
        "next_meanings": setpoint_signoff.next_meanings(proposal),
        "signoff": setpoint_signoff,
        "state_label": setpoint_signoff.state_label(proposal.state),
        "for_production": setpoint_signoff.for_production(proposal),
        "tolerance": setpoint_signoff.tolerance_of(session, proposal),
        "default_tolerance": setpoints.default_tolerance(session, proposal),
        "resolution": setpoints.resolution_of(session, proposal),
        "duties": signing.SEPARATION_OF_DUTIES,
        # the fits' own factor order (the stored JSON has its keys sorted)
        "factor_names": setpoints.factor_order(session, proposal),
        # set by a number (not a level name): tolerance, gradient and stationary point
        "continuous_names": setpoints.numbered_factors(session, proposal),
        "held": setpoints.held_factors(proposal),
    }


def _sheet(proposal_id: int, error: str | None = None, field: str | None = None,
           status: int = 200):
    session = get_session()
    if error:
        session.rollback()
    proposal = setpoints.get_proposal(session, proposal_id)
    return render_template("setpoints/view.html", error=error, error_field=field,
                           **sheet_context(session, proposal)), status


@bp.route("/setpoints/<int:proposal_id>")
@allow(SIGNED_IN)
def view(proposal_id: int):
    return _sheet(proposal_id)


@bp.route("/setpoints/<int:proposal_id>/design-space")
@allow(SIGNED_IN)
def design_space_page(proposal_id: int):
    session = get_session()
    proposal = setpoints.get_proposal(session, proposal_id)
    result = setpoints.result_of(proposal)
    settings = result["optimum"]["settings"]
    chosen = setpoints.fits_of(session, proposal)
    # the map's axes are continuous factors; a categorical one stays at the proposed level
    names = ([f["name"] for f in fits.results_of(chosen[0])["model"]["factors"]
              if f.get("levels") is None] if chosen
             else [n for n, v in settings.items() if not isinstance(v, str)])
    x = request.args.get("x") or names[0]
    y = request.args.get("y") or (names[1] if len(names) > 1 else names[0])
    specs = {r: g["spec"] for r, g in setpoints.goals_of(proposal).items() if g.get("spec")}
    context = {"proposal": proposal, "study": proposal.study, "caution": CAUTION,
               "names": names, "x": x, "y": y, "specs": specs, "space": None, "spec": None}
    if specs and len(names) > 1:
        fixed = {n: v for n, v in settings.items() if n not in (x, y)}
        try:
            space = design_space({f.response: fits.search_document(f) for f in chosen}, specs, x, y,
                                 fixed=fixed, points=41)
        except SetpointError as exc:
            raise WorkflowError(f"{exc}.", field=exc.field) from None
        context["space"] = space
        context["spec"] = design_space_chart(space, settings)
    return render_template("setpoints/design_space.html", **context)


SIGNED_MESSAGES = {
    setpoint_signoff.RELEASE: "Setpoints released for confirmation runs; they are not for "
                              "production use until confirmed.",
    setpoint_signoff.CONFIRM: "Setpoints confirmed for production use.",
    setpoint_signoff.RETURN: "Proposal returned to its author with your reasons.",
    setpoint_signoff.WITHDRAW: "Setpoints withdrawn.",
}


def _tolerance_form(form, names: list[str]) -> dict[str, str]:
    """``tolerance_{j}`` is the j-th continuous factor in the sheet's order
    (setpoints.numbered_factors)."""
    return {name: form.get(f"tolerance_{j}", "") for j, name in enumerate(names)}


@bp.route("/setpoints/<int:proposal_id>/sign", methods=["POST"])
@allow("approver")
def sign(proposal_id: int):
    """One form per transition; the meaning selects it (app.workflow.setpoint_signoff)."""
    form = request.form
    meaning = form.get("meaning", "")
    raw_version = (form.get("row_version") or "").strip()
    try:
        expected = int(raw_version) if raw_version else None
    except ValueError:
        return _sheet(proposal_id, "row_version must be a whole number.", "row_version", 400)

    def act(s, actor, proof):
        proposal = setpoints.get_proposal(s, proposal_id)
        names = setpoints.numbered_factors(s, proposal)
        setpoint_signoff.sign(s, actor, proposal, proof=proof, meaning=meaning,
                              comment=form.get("comment"),
                              tolerance=_tolerance_form(form, names),
                              expected_row_version=expected)

    try:
        signing.signed(read_session, tx, actor_id=g.user.id, password=form.get("password"),
                       attempt=setpoint_signoff.attempt(proposal_id, meaning), act=act,
                       limits=signing.Lockout.from_config(current_app.config))
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        return _sheet(proposal_id, exc.message, exc.field, exc.status)
    flash(SIGNED_MESSAGES.get(meaning, "Signed."))
    return redirect(url_for("setpoints.view", proposal_id=proposal_id))


@bp.route("/setpoints/<int:proposal_id>/confirmations", methods=["POST"])
@allow("engineer")
def confirm(proposal_id: int):
    file = request.files.get("file")
    cfg = current_app.config
    data = b"" if file is None else file.read()
    filename = "" if file is None else (file.filename or "")
    try:
        # Parsed before the write transaction opens: a slow file never holds other writes.
        raw = confirmations.read_file(data, filename, max_bytes=int(cfg["MAX_UPLOAD_BYTES"]),
                                      max_cells=int(cfg["MAX_UPLOAD_CELLS"]))
        with tx() as s:
            proposal = setpoints.get_proposal(s, proposal_id)
            run = confirmations.record(s, me(s), proposal, data=data, filename=filename,
                                       raw=raw)
            verdict = confirmations.results_of(run)["verdict"]
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        get_session().rollback()
        with tx() as s:
            confirmations.record_refusal(s, me(s), proposal_id, filename, exc)
        return _sheet(proposal_id, exc.message, exc.field, exc.status)
    flash(f"Confirmation runs recorded: {verdict}." + (
        "" if verdict == "pass" else " The setpoints are marked 'confirmation failed'; they "
        "can only be withdrawn."))
    return redirect(url_for("setpoints.view", proposal_id=proposal_id) + "#confirmations")


@bp.route("/setpoints/<int:proposal_id>/export.csv")
@allow(SIGNED_IN)
def export_csv(proposal_id: int):
    session = get_session()
    proposal = setpoints.get_proposal(session, proposal_id)
    return attachment(setpoint_export.export_csv(session, proposal),
                      f"setpoints_{proposal_id}.csv", "text/csv")


@bp.route("/setpoints/<int:proposal_id>/export.json")
@allow(SIGNED_IN)
def export_json(proposal_id: int):
    session = get_session()
    proposal = setpoints.get_proposal(session, proposal_id)
    body = json.dumps(setpoint_export.export_json(session, proposal), indent=2,
                      ensure_ascii=False).encode()
    return attachment(body, f"setpoints_{proposal_id}.json", "application/json")
