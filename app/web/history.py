"""The auditor's history: timeline, event detail, exports, integrity check, reproduce, package.

Read-only and for the auditor role only (DESIGN.md: auditor, read-only). Approvers see a fit's
own history on its review page.
"""

from __future__ import annotations

from flask import Blueprint, current_app, render_template, request

from app.store import audit
from app.store.db import get_session
from app.store.models import Study
from app.web.access import allow
from app.web.common import attachment
from app.web.reports import study_reports
from app.workflow import fits, studies
from app.workflow import history as trail
from app.workflow.compare import reproduce as rerun
from app.workflow.package import build_package

bp = Blueprint("history", __name__, url_prefix="/history")


@bp.route("/studies/<int:study_id>")
@allow("auditor")
def study(study_id: int):
    session = get_session()
    record = studies.get_study(session, study_id)
    filters = trail.Filters.from_args(request.args)
    events = trail.timeline(session, record, filters)
    return render_template("history/study.html", study=record, events=events, filters=filters,
                           facets=trail.facets(session, record), decode=trail.decoded)


@bp.route("/events/<int:event_id>")
@allow("auditor")
def event(event_id: int):
    session = get_session()
    item = trail.get_event(session, event_id)
    record = None if item.study_id is None else session.get(Study, item.study_id)
    return render_template("history/event.html", event=item, study=record,
                           old=trail.decoded(item.old_json), new=trail.decoded(item.new_json))


def _export(study_id: int, render, suffix: str, mimetype: str):
    """The study's (filtered) trail with the chain head, as a download."""
    session = get_session()
    record = studies.get_study(session, study_id)
    events = trail.timeline(session, record, trail.Filters.from_args(request.args))
    return attachment(render(record, events, audit.chain_head(session)),
                      f"study-{study_id}-history.{suffix}", mimetype)


@bp.route("/studies/<int:study_id>/export.csv")
@allow("auditor")
def export_csv(study_id: int):
    return _export(study_id, trail.export_csv, "csv", "text/csv; charset=utf-8")


@bp.route("/studies/<int:study_id>/export.json")
@allow("auditor")
def export_json(study_id: int):
    return _export(study_id, trail.export_json, "json", "application/json")


@bp.route("/integrity")
@allow("auditor")
def integrity():
    return render_template("history/integrity.html", report=trail.integrity(get_session()))


@bp.route("/fits/<int:fit_id>/reproduce")
@allow("auditor")
def reproduce(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    return render_template("history/reproduce.html", fit=fit, result=rerun(fit),
                           software=current_app.config.get("SOFTWARE_VERSION", ""))


@bp.route("/studies/<int:study_id>/package.zip")
@allow("auditor")
def package(study_id: int):
    session = get_session()
    record = studies.get_study(session, study_id)
    data = build_package(session, record, current_app.config.get("SOFTWARE_VERSION", ""),
                         reports=study_reports(session, record))
    return attachment(data, f"study-{study_id}-record-package.zip", "application/zip")
