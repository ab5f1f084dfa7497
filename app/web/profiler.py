"""The profiler: predictions at settings the engineer types or drags, one trace per factor.

``/fits/<id>/profiler`` draws the chart once (a Vega-Lite spec built here with Altair, its rows
in the named dataset ``traces``); static/js/profiler.js asks ``/fits/<id>/profiler.json`` for
new numbers as a setting moves and swaps the rows in. The numbers are the API's
(``POST /api/v1/fits/{id}/predictions``): both go through app.workflow.predictions.
"""

from __future__ import annotations

from typing import Any

import altair as alt
from flask import Blueprint, jsonify, render_template, request

from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.charts import HIGHLIGHT, POINT, REFERENCE
from app.workflow import WorkflowError, fits, predictions

bp = Blueprint("profiler", __name__)

BAND = "#9fb8cc"  # the confidence band, a pale form of the points' ink blue
SIDE = 210


def rows(answer: dict[str, Any]) -> list[dict[str, Any]]:
    """The traces as the chart's rows (one per point of every trace)."""
    return [{"factor": t["factor"], "value": p["value"], "predicted": p["predicted"],
             "lo": p["ci"][0], "hi": p["ci"][1], "inside": p["inside_design_region"],
             "at": t["at"]}
            for t in answer["traces"] for p in t["points"]]


def chart(answer: dict[str, Any]) -> dict[str, Any]:
    """One panel per factor (shared response axis), band, line, the chosen value marked, and
    points beyond the design region drawn grey."""
    response = answer["response"]
    x = alt.X("value:Q", title=None, scale=alt.Scale(zero=False))
    y = alt.Y("predicted:Q", title=response, scale=alt.Scale(zero=False))
    base = alt.Chart()
    band = base.mark_area(color=BAND, opacity=0.45).encode(x=x, y="lo:Q", y2="hi:Q")
    line = base.mark_line(color=POINT, strokeWidth=2).encode(x=x, y=y)
    outside = (base.transform_filter("!datum.inside")
               .mark_point(color=REFERENCE, filled=True, size=14).encode(x=x, y=y))
    chosen = base.transform_filter("datum.value === datum.at")
    rule = chosen.mark_rule(color=HIGHLIGHT, strokeDash=[4, 3]).encode(x=x)
    dot = chosen.mark_point(color=HIGHLIGHT, filled=True, size=70).encode(
        x=x, y=y, tooltip=[alt.Tooltip("factor:N", title="Factor"),
                           alt.Tooltip("value:Q", title="Setting", format=".4~g"),
                           alt.Tooltip("predicted:Q", title=response, format=".4~g"),
                           alt.Tooltip("lo:Q", title="CI low", format=".4~g"),
                           alt.Tooltip("hi:Q", title="CI high", format=".4~g")])
    order = [t["factor"] for t in answer["traces"]]
    faceted = (alt.layer(band, line, outside, rule, dot)
               .properties(width=SIDE, height=SIDE)
               .facet(column=alt.Column("factor:N", sort=order, title=None),
                      data=alt.NamedData(name="traces"))
               .resolve_scale(x="independent"))
    spec = faceted.to_dict(validate=False)
    spec["datasets"] = {"traces": rows(answer)}
    return spec


def _asked(fit) -> dict[str, float | str] | None:
    """Settings in the query string; a factor not named stays at the design centre (None when
    none is named)."""
    factors = fits.results_of(fit)["model"]["factors"]
    if not any(f["name"] in request.args for f in factors):
        return None
    given: dict[str, float | str] = {}
    for f in factors:
        name, text = f["name"], request.args.get(f["name"], "")
        if f.get("levels") is not None:  # a level name, checked by the analysis
            given[name] = text or f["levels"][0]
            continue
        if not text.strip():
            given[name] = 0.0 if f.get("low") is None else (f["low"] + f["high"]) / 2.0
            continue
        try:
            given[name] = float(text)
        except ValueError:
            raise WorkflowError(f"The setting for '{name}' must be a number (got '{text}').",
                                field=name) from None
    return given


@bp.route("/fits/<int:fit_id>/profiler")
@allow(SIGNED_IN)
def page(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    answer = predictions.traces(fit, _asked(fit), request.args.get("level"))
    return render_template("fits/profiler.html", fit=fit, study=fit.study,
                           version=fit.data_version, answer=answer, spec=chart(answer))


@bp.route("/fits/<int:fit_id>/profiler.json")
@allow(SIGNED_IN)
def numbers(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    try:
        answer = predictions.traces(fit, _asked(fit), request.args.get("level"))
    except WorkflowError as exc:  # the page's script shows the message beside the settings
        return jsonify({"error": exc.message, "field": exc.field, "status": exc.status}), \
            exc.status
    # The chart's rows stand in for the traces they are made from.
    return jsonify({**{k: v for k, v in answer.items() if k != "traces"}, "rows": rows(answer)})
