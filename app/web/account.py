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

from app.store.base import utcnow
from app.store.models import ApiToken
from app.web.access import SIGNED_IN, allow
from app.web.common import me, read_session, tx
from app.workflow import WorkflowError, accounts, signing

bp = Blueprint("account", __name__, url_prefix="/account")


def _page(new_token: str | None):
    from app.store.db import get_session

    tokens = list(get_session().scalars(select(ApiToken).where(ApiToken.user_id == g.user.id)
                                        .order_by(ApiToken.created_at.desc())))
    return render_template("account/page.html", tokens=tokens, new_token=new_token,
                           now=utcnow(), token_days=int(current_app.config["API_TOKEN_DAYS"]),
                           token_max_days=int(current_app.config["API_TOKEN_MAX_DAYS"]))


@bp.route("/")
@allow(SIGNED_IN)
def page():
    return _page(None)


@bp.route("/tokens", methods=["POST"])
@allow(SIGNED_IN)
def create_token():
    """The password is entered again and checked before the write, against the same counter of
    wrong passwords as signing; every refusal is audited."""
    cfg = current_app.config
    attempt = signing.Attempt(doing="create API token", object_type="user",
                              object_id=g.user.id, action="token.create_refused")
    form = request.form
    try:
        _token, raw = signing.signed(
            read_session, tx, actor_id=g.user.id, password=form.get("password", ""),
            attempt=attempt, limits=signing.Lockout.from_config(cfg),
            refusal="The password is wrong; no token was made.",
            act=lambda s, actor, proof: accounts.create_token(
                s, actor, actor, form.get("name", ""),
                scope=form.get("scope", accounts.READ_WRITE),
                days=form.get("days") or int(cfg["API_TOKEN_DAYS"]),
                max_days=int(cfg["API_TOKEN_MAX_DAYS"]), proof=proof))
    except WorkflowError as exc:
        flash(exc.message, "error")
        return redirect(url_for("account.page"))
    # The raw token is shown once, now; only its SHA-256 is stored.
    return _page(raw)


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
