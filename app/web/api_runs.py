"""A fit's per-run table through the API: pages of runs as JSON, or every run as CSV.

The fit document (``GET /api/v1/fits/{id}``) carries the per-run summary and links here, so it
stays small whatever the number of runs.
"""

from __future__ import annotations

from flask import Blueprint, Response, jsonify, request, stream_with_context, url_for

from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.openapi import Media, document, id_parameter, ref, schema
from app.workflow import WorkflowError, fits

bp = Blueprint("api_runs", __name__, url_prefix="/api/v1")

DEFAULT_LIMIT = 1000
OFFSET = {"name": "offset", "in": "query", "required": False,
          "schema": {"type": "integer", "minimum": 0, "default": 0},
          "description": "Position of the first run to return (0 for the first)"}
LIMIT = {"name": "limit", "in": "query", "required": False,
         "schema": {"type": "integer", "minimum": 1, "maximum": fits.RUNS_PAGE_MAX,
                    "default": DEFAULT_LIMIT},
         "description": "How many runs to return at most"}

schema("RunPage", {
    "type": "object", "required": ["fit", "total", "offset", "limit", "runs", "next"],
    "properties": {
        "fit": {"type": "integer"}, "total": {"type": "integer"},
        "offset": {"type": "integer"}, "limit": {"type": "integer"},
        "runs": {"type": "array", "items": {"type": "object"},
                 "description": "Per-run values in row order: row, run order, label, excluded "
                                "and why, settings (actual and coded), observed, fitted, "
                                "residuals, leverage, Cook's distance, DFFITS, check flags"},
        "next": {"type": ["string", "null"], "description": "The next page, null at the end"},
    }})


def _whole(name: str, default: int, low: int, high: int | None = None) -> int:
    text = request.args.get(name)
    if text is None:
        return default
    if not text.isdigit() or int(text) < low or (high is not None and int(text) > high):
        raise WorkflowError(f"Query field '{name}' must be a whole number from {low}"
                            + (f" to {high:,}" if high is not None else "") + f" (got '{text}').",
                            field=name)
    return int(text)


def links(fit_id: int) -> dict[str, str]:
    return {"runs": url_for("api_runs.page", fit_id=fit_id),
            "runs_csv": url_for("api_runs.csv", fit_id=fit_id)}


@bp.route("/fits/<int:fit_id>/runs")
@allow(SIGNED_IN)
@document("GET", "/fits/{fit_id}/runs", "A page of a fit's runs", tags=("Fits",),
          parameters=(id_parameter("fit_id"), OFFSET, LIMIT),
          responses={200: ("Runs offset … offset + limit", "RunPage"),
                     400: ("offset or limit out of range", ref("Error"))})
def page(fit_id: int):
    offset = _whole("offset", 0, 0)
    limit = _whole("limit", DEFAULT_LIMIT, 1, fits.RUNS_PAGE_MAX)
    fit = fits.get_fit(get_session(), fit_id)
    cols = fits.runs_of(fit)
    total = len(cols)
    nxt = (url_for("api_runs.page", fit_id=fit_id, offset=offset + limit, limit=limit)
           if offset + limit < total else None)
    return jsonify({"fit": fit.id, "total": total, "offset": offset, "limit": limit,
                    "runs": cols.records(offset, offset + limit), "next": nxt})


@bp.route("/fits/<int:fit_id>/runs.csv")
@allow(SIGNED_IN)
@document("GET", "/fits/{fit_id}/runs.csv", "Every run of a fit as CSV", tags=("Fits",),
          responses={200: ("One line per run, in row order", Media({"text/csv": {
              "type": "string"}}))})
def csv(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    fits.runs_of(fit)  # fail here (404, 500), not halfway through the stream
    response = Response(stream_with_context(fits.runs_csv(fit)), mimetype="text/csv")
    response.headers["Content-Disposition"] = f'attachment; filename="fit-{fit.id}-runs.csv"'
    response.headers["X-Snapshot-SHA256"] = fit.snapshot_sha256
    return response
