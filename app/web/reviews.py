"""Review and sign-off pages: submit, the review page, sign, withdraw."""

from __future__ import annotations

import json

import numpy as np
from flask import Blueprint, current_app, flash, g, redirect, render_template, request, url_for

from app.analysis.calibration import rates_for_design
from app.store import audit
from app.store.db import get_session
from app.web.access import allow
from app.web.common import me, read_session, tx
from app.workflow import WorkflowError, fits, plans, reviews, signing, teams
from app.workflow.compare import differences
from app.workflow.history import events_of_fit

bp = Blueprint("reviews", __name__)


@bp.app_template_global("chain_head")
def chain_head() -> dict:
    """The audit chain head (seq and hash) for every printed record.

    Read through the request's own session: a second session per request would hold two pooled
    connections at once, and enough concurrent requests then wait on each other until the pool
    times out."""
    seq, head_hash = audit.chain_head(get_session())
    return {"seq": seq, "hash": head_hash}


@bp.app_template_global("signature_check")
def signature_check(fit, signature) -> reviews.SignatureCheck:
    return reviews.check_signature(fit, signature)


def _row_version(form) -> int | None:
    raw = (form.get("row_version") or "").strip()
    if not raw:
        return None
    try:
        return int(raw)
    except ValueError:
        raise WorkflowError(f"row_version must be a whole number (got '{raw}').",
                            field="row_version") from None


def _back(fit_id: int):
    target = request.form.get("next") or ""
    if target.startswith("/fits/") and "//" not in target:
        return redirect(target)
    return redirect(url_for("reviews.review", fit_id=fit_id))


@bp.route("/fits/<int:fit_id>/submit", methods=["POST"])
@allow("engineer")
def submit(fit_id: int):
    try:
        with tx() as s:
            fit = fits.get_fit(s, fit_id)
            reviews.submit(s, me(s), fit, _row_version(request.form))
        flash(f"Fit {fit_id} submitted for review.")
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        return _failed(fit_id, exc)
    return _back(fit_id)


# The columns of the `make calibrate` table, in the words the review page uses.
RATE_COLUMNS = (
    {"key": "clean", "label": "clean data (false alarms)"},
    {"key": "ar1", "label": "AR(1) ρ = 0.6 in run order"},
    {"key": "drift", "label": "drift of 3 SD"},
    {"key": "spread", "label": "SD doubled at high A"},
    {"key": "outlier", "label": "one 4 SD outlier"},
    {"key": "square", "label": "missing square term"},
)


def _barred(fit) -> str | None:
    """Why separation of duties keeps the viewer from signing this fit, if it does."""
    try:
        signing.check_fit_signer(g.user, fit)
    except signing.DutiesConflict as exc:
        return exc.message
    return None


# The review page lists at most this many flagged runs; the rest are in the per-run CSV.
FLAGGED_LISTED = 200


def flagged_runs(fit) -> dict:
    """The flagged runs (the first FLAGGED_LISTED, most extreme first) and how many there are."""
    cols = fits.runs_of(fit)
    index = np.flatnonzero(np.isin(cols.row, np.fromiter(cols.flags, dtype=np.int64,
                                                          count=len(cols.flags))))
    total = len(index)
    if total > FLAGGED_LISTED:
        extreme = np.abs(np.nan_to_num(cols.values["deleted_studentized"][index]))
        index = np.sort(index[np.argsort(-extreme, kind="stable")[:FLAGGED_LISTED]])
    return {"rows": [cols.records(i, i + 1)[0] for i in index.tolist()], "total": total}


def excluded_runs(fit, results: dict) -> dict:
    """The runs left out of the fit with their label, settings in natural units (a categorical
    factor's level name) and reason (the first FLAGGED_LISTED), and how many there are."""
    cols = fits.runs_of(fit)
    index = np.flatnonzero(cols.excluded)
    levels = {f["name"]: f.get("levels") for f in results.get("model", {}).get("factors", [])}
    rows = [cols.records(i, i + 1)[0] for i in index[:FLAGGED_LISTED].tolist()]
    for r in rows:
        r["settings"] = {f: (levels[f][int(v) - 1] if levels.get(f) and v is not None else v)
                         for f, v in r["actual"].items()}
    return {"rows": rows, "total": len(index), "factors": list(cols.factors)}


def review_context(session, fit) -> dict:
    results = fits.results_of(fit)
    checks = results.get("checks", [])
    previous = reviews.previous_approved(session, fit)
    return {
        "fit": fit, "study": fit.study, "results": results, "checks": checks,
        "not_run": [c for c in checks if c["verdict"] == "not_applicable"],
        "flagged": flagged_runs(fit),
        "exclusions": json.loads(fit.spec_json).get("exclusions", []),
        "excluded_runs": excluded_runs(fit, results),
        "thresholds": json.loads(fit.thresholds_json),
        "events": events_of_fit(session, fit),
        "threshold_changes": teams.threshold_changes_after(session, fit.study_id,
                                                           fit.submitted_at),
        "previous": previous,
        "diff": None if previous is None else differences(previous, fit),
        "meanings": list(reviews.SIGN_MEANINGS),
        "duties": signing.SEPARATION_OF_DUTIES,
        "barred": _barred(fit),
        "design_rates": rates_for_design(results.get("design", {}),
                                         results.get("spec", {}).get("model")),
        "rate_columns": RATE_COLUMNS,
        "decode": lambda text: None if text is None else json.loads(text),
        # Randomised from a plan? And did the settings run follow it?
        "plan_check": plans.deviations(session, fit.data_version),
    }


@bp.route("/fits/<int:fit_id>/review")
@allow("approver", "engineer", "auditor")
def review(fit_id: int):
    session = get_session()
    fit = fits.get_fit(session, fit_id)
    return render_template("reviews/review.html", **review_context(session, fit))


def signed(attempt: signing.Attempt, act):
    """Run a signing step: password checked before the write, every refusal audited."""
    return signing.signed(read_session, tx, actor_id=g.user.id,
                          password=request.form.get("password"), attempt=attempt, act=act,
                          limits=signing.Lockout.from_config(current_app.config))


@bp.route("/fits/<int:fit_id>/sign", methods=["POST"])
@allow("approver")
def sign(fit_id: int):
    form = request.form

    def act(s, actor, proof):
        return reviews.sign(s, actor, fits.get_fit(s, fit_id), meaning=form.get("meaning", ""),
                            proof=proof, comment=form.get("comment"),
                            expected_row_version=_row_version(form)).meaning

    try:
        meaning = signed(reviews.attempt(fit_id, "sign"), act)
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        return _failed(fit_id, exc)
    flash(f"Signed: {meaning}.")
    return redirect(url_for("reviews.review", fit_id=fit_id))


@bp.route("/fits/<int:fit_id>/withdraw", methods=["POST"])
@allow("approver")
def withdraw(fit_id: int):
    form = request.form

    def act(s, actor, proof):
        reviews.withdraw(s, actor, fits.get_fit(s, fit_id), proof=proof,
                         reason=form.get("reason", ""), expected_row_version=_row_version(form))

    try:
        signed(reviews.attempt(fit_id, "withdraw"), act)
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        return _failed(fit_id, exc)
    flash(f"Fit {fit_id} withdrawn from use.")
    return redirect(url_for("reviews.review", fit_id=fit_id))


def _failed(fit_id: int, exc: WorkflowError):
    """The review page again with the refusal shown beside the form, and the error status."""
    session = get_session()
    session.rollback()
    fit = fits.get_fit(session, fit_id)
    return render_template("reviews/review.html", error=exc.message, error_field=exc.field,
                           error_at=request.endpoint.rsplit(".", 1)[-1], form=request.form,
                           **review_context(session, fit)), exc.status
