"""The signed-in user's own page: password and personal API tokens."""

from __future__ import annotations

from flask import (
    Blueprint,
    current_app,
    flash,
    g,
    redirect,
    render_template,
    request,
    session,
    url_for,
)
from sqlalchemy import select

from app.store.models import ApiToken
from app.web.access import SIGNED_IN, allow
from app.web.common import me, read_session, tx
from app.workflow import WorkflowError, accounts, signing

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


def _new_password_hash(attempt: signing.Attempt, limits: signing.Lockout) -> str:
    """The new password checked and hashed before any write; a refusal is audited."""
    new = request.form.get("new_password", "")
    try:
        if new != request.form.get("confirm_password", ""):
            raise WorkflowError("The new password and its confirmation differ.",
                                field="confirm_password")
        return accounts.new_password_hash(new, username=g.user.username)
    except WorkflowError as exc:
        with tx() as s:
            signing.record_refusal(s, me(s), attempt, exc, limits)
        raise


@bp.route("/password", methods=["POST"])
@allow(SIGNED_IN)
def change_password():
    """The current password is checked before the write, against the same counter of wrong
    passwords as signing; every refusal is audited."""
    attempt = signing.Attempt(doing="change password", object_type="user",
                              object_id=g.user.id, action="user.password_change_refused")
    limits = signing.Lockout.from_config(current_app.config)
    try:
        new_hash = _new_password_hash(attempt, limits)
        signing.signed(read_session, tx, actor_id=g.user.id,
                       password=request.form.get("current_password", ""), attempt=attempt,
                       act=lambda s, actor, proof: accounts.change_own_password(s, actor, proof,
                                                                                 new_hash),
                       limits=limits, refusal="The current password is wrong.")
    except WorkflowError as exc:
        flash(exc.message, "error")
        return redirect(url_for("account.page"))
    session.clear()
    flash("Password changed. Sign in again with the new password.")
    return redirect(url_for("auth.login"))
