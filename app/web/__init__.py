"""Web layer: blueprints by feature, access control, security headers, error pages."""

from __future__ import annotations

import json
import re

from flask import Flask, g, jsonify, render_template, request
from werkzeug.exceptions import HTTPException

from app.web.access import csrf_token, enforce_access, is_api
from app.web.common import IdConverter
from app.workflow import WorkflowError

# Vega runs with its expression interpreter (vega-interpreter), so no 'unsafe-eval' is needed.
# Vega sets style attributes on the SVG it draws, hence 'unsafe-inline' for styles only.
CSP = ("default-src 'self'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
       "img-src 'self' data:; object-src 'none'; base-uri 'self'; form-action 'self'; "
       "frame-ancestors 'none'")


def _security_headers(response):
    response.headers.setdefault("Content-Security-Policy", CSP)
    response.headers.setdefault("X-Content-Type-Options", "nosniff")
    response.headers.setdefault("Referrer-Policy", "same-origin")
    response.headers.setdefault("X-Frame-Options", "DENY")
    if request.path.startswith("/api/") or getattr(g, "user", None) is not None:
        response.headers.setdefault("Cache-Control", "no-store")
    return response


def _error(exc: Exception):
    if isinstance(exc, WorkflowError):
        status, message = exc.status, exc.message
        if is_api():
            body = {"error": message, "status": status}
            if exc.field:
                body["field"] = exc.field
            return jsonify(body), status
        return render_template("error.html", status=status, message=message), status
    headers: list[tuple[str, str]] = []
    if isinstance(exc, HTTPException):
        if exc.response is not None:
            return exc.response
        status, message = exc.code or 500, exc.description
        # Keep what the exception says besides its HTML body: Allow on a 405 (RFC 9110 requires
        # it), WWW-Authenticate on a 401, Content-Range on a 416.
        headers = [(k, v) for k, v in exc.get_headers() if k.lower() != "content-type"]
    else:
        status, message = 500, "Something went wrong on the server. It has been logged."
        from flask import current_app

        current_app.logger.exception("unhandled error")
    if status >= 500:
        message = "Something went wrong on the server. It has been logged."
    if is_api():
        return jsonify({"error": message, "status": status}), status, headers
    return render_template("error.html", status=status, message=message), status, headers


def register(app: Flask) -> None:
    from app.web import (
        account,
        admin,
        api,
        api_plans,
        api_predictions,
        api_reports,
        api_reviews,
        api_runs,
        api_setpoints,
        api_teams,
        auth,
        data,
        fits,
        history,
        plans,
        profiler,
        reports,
        reviews,
        setpoints,
        studies,
    )

    # Before any blueprint adds its rules: every <int:...> id is at most ID_MAX (2**31 - 1).
    app.url_map.converters["int"] = IdConverter
    app.before_request(enforce_access)
    app.after_request(_security_headers)
    app.register_error_handler(WorkflowError, _error)
    app.register_error_handler(HTTPException, _error)
    app.register_error_handler(Exception, _error)
    app.jinja_env.globals["csrf_token"] = csrf_token
    app.jinja_env.filters["fromjson"] = json.loads
    app.jinja_env.filters["json_text"] = json_text
    for module in (auth, account, admin, studies, data, api, fits, reviews, history, api_reviews,
                   setpoints, api_setpoints, api_teams, api_runs, api_predictions,
                   profiler, reports, api_reports, api_plans, plans):
        app.register_blueprint(module.bp)
    from app.analysis.rounding import round_to, setting_text

    app.jinja_env.filters["round_to"] = round_to
    app.jinja_env.filters["setting"] = setting_text
    app.jinja_env.filters["utc"] = lambda dt: "" if dt is None else dt.strftime(
        "%Y-%m-%d %H:%M:%S UTC")


# Characters that change how text around them reads without showing themselves: C1 controls,
# and the marks and overrides of the Unicode bidirectional algorithm.
_HIDDEN = re.compile("[\u007f-\u009f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def json_text(value) -> str:
    """JSON shown as text to read (an event's values): characters as they are ('°C'), but
    those that would hide or reorder text escaped as in JSON; HTML-escaped by the template
    like any other text (``tojson`` is for JSON placed in scripts and attributes)."""
    text = json.dumps(value, ensure_ascii=False, sort_keys=True, default=str)
    return _HIDDEN.sub(lambda m: f"\\u{ord(m.group()):04x}", text)
