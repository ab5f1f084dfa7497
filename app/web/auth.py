"""Sign in and sign out."""

from __future__ import annotations

import secrets
from urllib.parse import urlsplit

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

from app.store.db import database
from app.web.access import PUBLIC, SIGNED_IN, allow
from app.workflow import accounts

bp = Blueprint("auth", __name__)


def _safe_next(target: str | None) -> str:
    if not target:
        return url_for("studies.index")
    parts = urlsplit(target)
    # Only same-site paths: no scheme, no host, no protocol-relative //host.
    if parts.scheme or parts.netloc or not target.startswith("/") or target.startswith("//"):
        return url_for("studies.index")
    return target


def _login_name_key() -> bytes:
    """The key for the keyed hash that stands for a user name matching no account."""
    key = current_app.config.get("LOGIN_NAME_KEY") or current_app.config["SECRET_KEY"]
    return key if isinstance(key, bytes) else str(key).encode()


@bp.route("/login", methods=["GET", "POST"])
@allow(PUBLIC)
def login():
    if request.method == "GET":
        if g.user is not None:
            return redirect(url_for("studies.index"))
        return render_template("auth/login.html", next=request.args.get("next", ""))
    username = request.form.get("username", "")
    password = request.form.get("password", "")
    addr = request.remote_addr
    try:
        _user_id, token = accounts.sign_in(database().transaction, username, password, addr,
                                           name_key=_login_name_key())
    except (accounts.LoginThrottled, accounts.LoginRefused) as exc:
        return render_template("auth/login.html", error=exc.message, username=username,
                               next=request.form.get("next", "")), exc.status
    session.clear()  # a fresh signed cookie: no session fixation across the login
    session["sid"] = token
    session["csrf"] = secrets.token_urlsafe(32)
    session.permanent = False
    return redirect(_safe_next(request.form.get("next")))


@bp.route("/logout", methods=["POST"])
@allow(SIGNED_IN)
def logout():
    token = session.get("sid")
    if token:
        with database().transaction() as s:
            accounts.end_session(s, token, g.user)
    session.clear()
    flash("You are signed out.")
    return redirect(url_for("auth.login"))


@bp.route("/")
@allow(PUBLIC)
def home():
    return redirect(url_for("studies.index") if g.user else url_for("auth.login"))


@bp.route("/healthz")
@allow(PUBLIC)
def healthz():
    return {"status": "ok"}
