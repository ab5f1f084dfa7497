"""Sign in and sign out."""

from __future__ import annotations

import secrets
from urllib.parse import urlsplit

from flask import Blueprint, flash, g, redirect, render_template, request, session, url_for

from app.store.db import database
from app.store.models import User
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
    db = database()
    try:
        with db.session(write=False) as s:
            user = accounts.authenticate(s, username, password, addr)
        with db.transaction() as s:
            token = accounts.start_session(s, s.get(User, user.id), addr)
    except accounts.LoginThrottled as exc:
        return render_template("auth/login.html", error=exc.message, username=username,
                               next=request.form.get("next", "")), 429
    except accounts.LoginRefused as exc:
        with db.transaction() as s:
            accounts.record_failed_login(s, username, addr, "wrong user name or password")
        return render_template("auth/login.html", error=exc.message, username=username,
                               next=request.form.get("next", "")), 401
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
