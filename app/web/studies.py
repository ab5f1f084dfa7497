"""Studies: list, create, view, thresholds."""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for
from sqlalchemy import select
from sqlalchemy.orm import joinedload, selectinload

from app.store.db import get_session
from app.store.models import DataVersion, Fit, Study
from app.web import pagecache
from app.web.access import SIGNED_IN, allow
from app.web.common import float_field, me, tx
from app.workflow import WorkflowError, studies

bp = Blueprint("studies", __name__, url_prefix="/studies")


@bp.route("/")
@allow(SIGNED_IN)
def index():
    return render_template("studies/index.html", studies=studies.list_studies(get_session()))


@bp.route("/new", methods=["GET", "POST"])
@allow("engineer")
def create():
    if request.method == "GET":
        return render_template("studies/new.html", form={})
    form = request.form
    try:
        with tx() as s:
            study = studies.create_study(
                s, me(s), title=form.get("title", ""), purpose=form.get("purpose", ""),
                process=form.get("process", ""),
                review_below=float_field(form, "review_below", "Review below", 0.05),
                fail_below=float_field(form, "fail_below", "Fail below", 0.01))
    except WorkflowError as exc:
        return render_template("studies/new.html", form=form, error=exc.message,
                               field=exc.field), 400
    flash("Study created.")
    return redirect(url_for("studies.view", study_id=study.id))


@bp.route("/<int:study_id>")
@allow(SIGNED_IN)
def view(study_id: int):
    return pagecache.render(("study", study_id), lambda: _render_view(study_id))


def _render_view(study_id: int) -> str:
    session = get_session()
    study = session.scalar(select(Study).where(Study.id == study_id).options(
        joinedload(Study.owner),
        selectinload(Study.data_versions).joinedload(DataVersion.created_by)))
    if study is None:
        studies.get_study(session, study_id)  # raises the plain 404
    fits = list(session.scalars(select(Fit).where(Fit.study_id == study.id)
                                .options(joinedload(Fit.created_by),
                                         joinedload(Fit.data_version))
                                .order_by(Fit.created_at.desc())))
    return render_template("studies/view.html", study=study, fits=fits)


@bp.route("/<int:study_id>/thresholds", methods=["POST"])
@allow("engineer")
def thresholds(study_id: int):
    form = request.form
    try:
        with tx() as s:
            study = studies.get_study(s, study_id)
            studies.set_thresholds(
                s, me(s), study,
                review_below=float_field(form, "review_below", "Review below"),
                fail_below=float_field(form, "fail_below", "Fail below"),
                reason=form.get("reason", ""))
        flash("Thresholds changed. Fits made from now on use them.")
    except WorkflowError as exc:
        flash(exc.message, "error")
    return redirect(url_for("studies.view", study_id=study_id))
