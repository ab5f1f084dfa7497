"""Runs left out of a fit, drawn on every run-based chart as hollow grey markers.

A left-out run took no part in the fit or its checks, so it must not look like one that did,
but it must not vanish either: a reviewer asks where it would have sat. Each run-based chart
gets one more layer, on its own dataset ``left_out``, with the chart's own x and y encodings and
a tooltip giving the written reason; the chart's data table lists the runs marked "left out".
The statistics, limits and bins are computed from the fitted runs alone, as before.

Where a left-out run lacks the chart's quantity it is placed as follows (and the note says so):

* residual: observed minus the model's prediction there;
* studentized residual and leverage: ``app.analysis.prediction.new_run_scores`` (the residual
  over the standard error of predicting a new observation, and the leverage of a new point);
* normal score: the score its residual would have among the fitted runs' residuals;
* Cook's distance: none (it did not steer the fit): drawn at zero.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
from scipy import stats

from app.analysis.prediction import new_run_scores
from app.analysis.runstore import RunColumns
from app.web.charts import HEIGHT, HIGHLIGHT, Chart, included_runs, level_names

LEFT_OUT = "#8a8f98"
# The point selection of the left-out layer (the fitted runs' layer has "pick").
PICK = "pick_left_out"
# At most this many left-out runs are drawn on one chart (as many as marked runs when binned).
DRAW_MAX = 300
NOTE = ("Hollow grey markers: runs left out of the fit (not part of any statistic here); "
        "each one's reason is listed with the runs left out.")

PLACED = {"studentized": "A left-out run's studentized residual is its residual over the "
                         "standard error of predicting a new run there.",
          "leverage": "Its leverage is that of a new point.",
          "normal_score": "It sits at the normal score its residual would have among the "
                          "fitted runs.",
          "cooks_distance": "It did not steer the fit: drawn at zero Cook's distance."}


def left_out_runs(cols: RunColumns) -> np.ndarray:
    """Positions of the runs left out of the fit, row order (at most ``DRAW_MAX``)."""
    return np.flatnonzero(cols.excluded)[:DRAW_MAX]


def _settings(results: dict, cols: RunColumns, idx: np.ndarray) -> dict[str, np.ndarray]:
    """Coded settings as the model rows take them (level numbers for a categorical factor)."""
    return {f["name"]: (cols.actual if f.get("levels") else cols.coded)[f["name"]][idx]
            for f in results["model"]["factors"]}


def _normal_scores(cols: RunColumns, residual: np.ndarray) -> np.ndarray:
    """Blom scores (as the normal plot's) of where each residual falls among the fitted runs."""
    fitted = np.sort(cols.values["residual"][included_runs(cols)])
    n = len(fitted)
    rank = np.searchsorted(fitted, residual) + 0.5
    return stats.norm.ppf((rank - 0.375) / (n + 0.25))


def _records(results: dict, cols: RunColumns, idx: np.ndarray,
             covariates: dict[str, dict[int, Any]]) -> list[dict[str, Any]]:
    residual = cols.values["residual"][idx]
    lev, stud = new_run_scores(results["model"], _settings(results, cols, idx), residual)
    fields: dict[str, list] = {
        "row": cols.row[idx].tolist(), "label": cols.labels(idx),
        "run_order": [None if v != v else int(v) for v in cols.run_order[idx].tolist()],
        "reason": [cols.exclusion_reason.get(int(i)) or "no reason recorded"
                   for i in idx.tolist()],
        "residual": residual.tolist(), "fitted": cols.values["fitted"][idx].tolist(),
        "observed": cols.values["observed"][idx].tolist(),
        "studentized": stud.tolist(), "leverage": lev.tolist(),
        "normal_score": _normal_scores(cols, residual).tolist(),
        "cooks_distance": [0.0] * len(idx)}
    for name in cols.factors:
        names = level_names(results, name)
        values = cols.actual[name][idx].tolist()
        fields[f"factor:{name}"] = [names[int(v) - 1] for v in values] if names else values
    for name, by_row in covariates.items():
        fields[f"covariate:{name}"] = [by_row.get(r) for r in fields["row"]]
    keys = list(fields)
    return [{k: (None if isinstance(v, float) and not np.isfinite(v) else v)
             for k, v in zip(keys, vals, strict=True)}
            for vals in zip(*fields.values(), strict=True)]


def _chart_fields(name: str) -> dict[str, str]:
    """Which record field feeds a field of the chart's run layer, where the names differ (the
    others, such as ``residual``, are the record's own)."""
    if ":" in name:
        kind, what = name.split(":", 1)
        source = f"covariate:{what}" if kind == "residuals_vs_covariate" else f"factor:{what}"
        return {"level": source, "value": source}
    return {}


def contour_fields(x_factor: str, y_factor: str) -> dict[str, str]:
    """The contour's run layer draws the two factors' settings as ``px`` and ``py``."""
    return {"px": f"factor:{x_factor}", "py": f"factor:{y_factor}"}


def _runs_layer(spec: dict) -> dict | None:
    """The layer that draws one mark per run (named ``runs``)."""
    return next((layer for layer in spec.get("layer", []) if layer.get("name") == "runs"),
                None)


def add_left_out(chart: Chart, results: dict, cols: RunColumns,
                 covariates: dict[str, dict[int, Any]] | None = None,
                 fields: dict[str, str] | None = None) -> Chart:
    """``chart`` with the left-out runs drawn on it and listed in its data table; ``fields``
    as :func:`contour_fields` where the chart's name does not say what its axes hold."""
    idx = left_out_runs(cols)
    runs = _runs_layer(chart.spec)
    if not len(idx) or runs is None:
        return chart
    records = _records(results, cols, idx, covariates or {})
    feeds = fields or _chart_fields(chart.name)
    encoding = {axis: dict(runs["encoding"][axis]) for axis in ("x", "y")
                if axis in runs["encoding"]}
    data = []
    for record in records:
        d = {"row": record["row"], "label": record["label"], "run_order": record["run_order"],
             "reason": record["reason"]}
        for enc in encoding.values():
            if "field" in enc:
                field = enc["field"]
                d[field] = record.get(feeds.get(field, field))
        data.append(d)
    kind = runs.get("mark")
    picked = "datum.row === highlight_row"
    # highlighted as the fitted runs are (static/js/charts.js listens to PICK as to "pick")
    encoding["color"] = {"condition": {"test": picked, "value": HIGHLIGHT}, "value": LEFT_OUT}
    if (kind if isinstance(kind, str) else (kind or {}).get("type")) == "tick":
        mark = {"type": "tick", "thickness": 2, "strokeDash": [2, 2]}
        encoding["y"] = {"value": HEIGHT}
    else:
        mark = {"type": "point", "filled": False, "strokeWidth": 2, "opacity": 1}
        encoding["size"] = {"condition": {"test": picked, "value": 160}, "value": 80}
    layer = {"name": "left_out", "data": {"name": "left_out"}, "mark": mark,
             "params": [{"name": PICK, "select": {"type": "point", "fields": ["row"],
                                                   "on": "click", "clear": "dblclick"}}],
             "encoding": {**encoding, "tooltip": [
                 {"field": "label", "type": "nominal", "title": "Run (left out)"},
                 {"field": "row", "type": "ordinal", "title": "Row"},
                 {"field": "reason", "type": "nominal", "title": "Why left out"}]}}
    spec = {**chart.spec, "layer": [*chart.spec["layer"], layer],
            "datasets": {**chart.spec["datasets"], "left_out": data}}
    listed = [(r["label"], r["run_order"], r["row"], r["reason"]) for r in records]
    drawn_as = {enc.get("field") for enc in encoding.values()}
    how = [words for field, words in PLACED.items() if field in drawn_as]
    note = " ".join([chart.note, NOTE, *how]).strip()
    return replace(chart, spec=spec, left_out=listed, note=note)

