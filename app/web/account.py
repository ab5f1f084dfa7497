"""The signed-in user's own page: password and personal API tokens."""

from __future__ import annotations

from flask import Blueprint, flash, g, redirect, render_template, request, session, url_for
from sqlalchemy import select

from app.store.models import ApiToken
from app.web.access import SIGNED_IN, allow
from app.web.common import me, tx
from app.workflow import WorkflowError, accounts
from app.workflow.passwords import verify_password

bp = Blueprint("account", __name__, url_prefix="/account")


def _tokens(s):
    return list(s.scalars(select(ApiToken).where(ApiToken.user_id == g.user.id)
                          .order_by(ApiToken.created_at.desc())))


@bp.route("/")
@allow(SIGNED_IN)
def page():
    from app.store.db import get_session

    return render_template("account/page.html", tokens=_tokens(get_session()), new_token=None)


@bp.route("/tokens", methods=["POST"])
@allow(SIGNED_IN)
def create_token():
    try:
        with tx() as s:
            user = me(s)
            _token, raw = accounts.create_token(s, user, user, request.form.get("name", ""))
    except WorkflowError as exc:
        flash(exc.message, "error")
        return redirect(url_for("account.page"))
    from app.store.db import get_session

    # The raw token is shown once, now; only its SHA-256 is stored.
    return render_template("account/page.html", tokens=_tokens(get_session()), new_token=raw)


@bp.route("/tokens/<int:token_id>/revoke", methods=["POST"])
@allow(SIGNED_IN)
def revoke_token(token_id: int):
    try:
        with tx() as s:
            accounts.revoke_token(s, me(s), token_id)
        flash("Token revoked.")
    except WorkflowError as exc:
        flash(exc.message, "error")
    return redirect(url_for("account.page"))


@bp.route("/password", methods=["POST"])
@allow(SIGNED_IN)
def change_password():
    current = request.form.get("current_password", "")
    new = request.form.get("new_password", "")
    if new != request.form.get("confirm_password", ""):
        flash("The new password and its confirmation differ.", "error")
        return redirect(url_for("account.page"))
    if not verify_password(g.user.password_hash, current):
        flash("The current password is wrong.", "error")
        return redirect(url_for("account.page"))
    try:
        with tx() as s:
            accounts.set_password(s, me(s), g.user.username, new)
    except WorkflowError as exc:
        flash(exc.message, "error")
        return redirect(url_for("account.page"))
    session.clear()
    flash("Password changed. Sign in again with the new password.")
    return redirect(url_for("auth.login"))
