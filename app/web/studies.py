"""Studies: list, create, view, thresholds, the team."""

from __future__ import annotations

from flask import Blueprint, flash, g, redirect, render_template, request, url_for
from sqlalchemy import select
from sqlalchemy.orm import joinedload, selectinload

from app.store.db import get_session
from app.store.models import DataVersion, Fit, Study
from app.web import pagecache
from app.web.access import SIGNED_IN, allow
from app.web.common import float_field, me, team_step, tx
from app.workflow import WorkflowError, plans, queue, studies, teams
from app.workflow import fits as fit_service

bp = Blueprint("studies", __name__, url_prefix="/studies")


@bp.app_template_global("may_act")
def may_act(study: Study) -> bool:
    """Whether the viewer may do an engineer's work in ``study`` (app.workflow.teams)."""
    return g.user is not None and teams.can_act(get_session(), g.user, study)


@bp.route("/")
@allow(SIGNED_IN)
def index():
    """The landing page: what waits for the viewer first, then the studies they may read."""
    session, user = get_session(), g.user
    signer = user.has_role("approver")
    mine = [i for i in queue.fits_in_state(session, user, "submitted")
            if user.id in (i["fit"].created_by_id, i["fit"].submitted_by_id)]
    return render_template(
        "studies/index.html", studies=teams.readable_studies(session, user),
        to_sign=queue.fits_in_state(session, user, "submitted") if signer else [],
        to_release=queue.proposals_awaiting_release(session, user) if signer else [],
        returned=queue.returned_to(session, user) if user.has_role("engineer") else [],
        mine=mine)


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
    if study is None or not teams.can_read(session, g.user, study):
        teams.study_for(session, g.user, study_id)  # raises the plain 404
    fits = list(session.scalars(select(Fit).where(Fit.study_id == study.id)
                                .options(joinedload(Fit.created_by),
                                         joinedload(Fit.data_version))
                                .order_by(Fit.created_at.desc())))
    return render_template("studies/view.html", study=study, fits=fits,
                           overview=fit_service.overview(study, fits),
                           plans=plans.plans_of_study(session, study.id),
                           team=teams.team(session, study),
                           may_manage=teams.can_manage(g.user, study),
                           may_set_thresholds=teams.can_set_thresholds(g.user, study),
                           team_rules=teams.TEAM_RULES)


@bp.route("/<int:study_id>/thresholds", methods=["POST"])
@allow("engineer")
def thresholds(study_id: int):
    form = request.form

    def act(s):
        studies.set_thresholds(
            s, me(s), teams.study_for(s, me(s), study_id),
            review_below=float_field(form, "review_below", "Review below"),
            fail_below=float_field(form, "fail_below", "Fail below"),
            reason=form.get("reason", ""))

    try:
        team_step(study_id, "change thresholds", act)
        flash("Thresholds changed. Fits made from now on use them.")
    except WorkflowError as exc:
        if exc.status == 404:
            raise
        flash(exc.message, "error")
    return redirect(url_for("studies.view", study_id=study_id))


def _team_page_step(study_id: int, doing: str, act, done: str):
    """A team change from the study page: flash what happened and go back to the team; a
    study the user may not read stays a 404."""
    try:
        team_step(study_id, doing, act)
        flash(done)
    except WorkflowError as exc:
        if exc.status == 404 and exc.field != "username":
            raise
        flash(exc.message, "error")
    return redirect(url_for("studies.view", study_id=study_id) + "#team")


@bp.route("/<int:study_id>/members", methods=["POST"])
@allow("engineer", "admin")
def add_member(study_id: int):
    username = request.form.get("username", "")

    def act(s):
        teams.add_member(s, me(s), teams.study_for(s, me(s), study_id), username)

    return _team_page_step(study_id, "add a team member", act,
                           f"{username.strip()} added to the team.")


@bp.route("/<int:study_id>/members/<username>/remove", methods=["POST"])
@allow("engineer", "admin")
def remove_member(study_id: int, username: str):
    def act(s):
        teams.remove_member(s, me(s), teams.study_for(s, me(s), study_id), username)

    return _team_page_step(study_id, "remove a team member", act,
                           f"{username} taken off the team.")
