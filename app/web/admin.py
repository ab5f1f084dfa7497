"""User administration (admin role only)."""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for
from sqlalchemy import select

from app.store.base import utcnow
from app.store.db import get_session
from app.store.models import ROLES, User
from app.web.access import allow
from app.web.common import me, tx
from app.workflow import WorkflowError, accounts, signing

bp = Blueprint("admin", __name__, url_prefix="/admin")


@bp.route("/users")
@allow("admin")
def users():
    rows = list(get_session().scalars(select(User).order_by(User.username)))
    now = utcnow()
    locked = {u.id: signing.locked_until(u, now) for u in rows}
    return render_template("admin/users.html", users=rows, roles=ROLES, locked=locked,
                           duties=signing.SEPARATION_OF_DUTIES)


def _refused(username: str, doing: str, exc: WorkflowError) -> None:
    """Show the refusal and put it on the record (the refused change itself rolled back)."""
    flash(exc.message, "error")
    with tx() as s:
        accounts.record_refused_change(s, me(s), username, doing, exc)


@bp.route("/users", methods=["POST"])
@allow("admin")
def add_user():
    username = request.form.get("username", "")
    try:
        with tx() as s:
            accounts.create_user(s, me(s),
                                 username=username,
                                 full_name=request.form.get("full_name", ""),
                                 roles=request.form.getlist("roles"),
                                 password=request.form.get("password", ""), one_time=True)
        flash("User added. The password is one-time: it must be changed at first sign-in.")
    except WorkflowError as exc:
        _refused(username, "add user", exc)
    return redirect(url_for("admin.users"))


@bp.route("/users/<username>/roles", methods=["POST"])
@allow("admin")
def set_roles(username: str):
    try:
        with tx() as s:
            accounts.set_roles(s, me(s), username,
                               request.form.getlist("roles"))
        flash(f"Roles of {username} changed.")
    except WorkflowError as exc:
        _refused(username, "set roles", exc)
    return redirect(url_for("admin.users"))


@bp.route("/users/<username>/active", methods=["POST"])
@allow("admin")
def set_active(username: str):
    active = request.form.get("active") == "1"
    try:
        with tx() as s:
            accounts.set_active(s, me(s), username, active)
        flash(f"{username} {'reactivated' if active else 'deactivated'}.")
    except WorkflowError as exc:
        _refused(username, "reactivate" if active else "deactivate", exc)
    return redirect(url_for("admin.users"))


@bp.route("/users/<username>/unlock", methods=["POST"])
@allow("admin")
def unlock(username: str):
    try:
        with tx() as s:
            accounts.unlock(s, me(s), username)
        flash(f"{username} may sign and change the password again.")
    except WorkflowError as exc:
        flash(exc.message, "error")
    return redirect(url_for("admin.users"))
