"""Residual-check charts: Vega-Lite specs built with Altair from a stored results document.

Every function reads the results dict (``FitResult.to_dict()`` as stored with the fit) and
returns a :class:`Chart`: its name (the ``chart`` field of the checks points here), a title,
the Vega-Lite spec and the rows of its text alternative. Nothing is refitted: the contour uses
the stored ``model`` part through :func:`predict_grid`, a vectorised form of
``app.analysis.predict``.

Run-based charts share two parameters so that one click highlights a run everywhere:
``pick`` (a point selection keyed on ``row``) and ``highlight_row`` (the highlighted row, 0 for
none). static/js/charts.js listens to each view's ``pick`` and sets ``highlight_row`` in all.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

import altair as alt
import numpy as np
from scipy import stats

from app.analysis import runstore, transforms
from app.analysis.prediction import model_rows
from app.analysis.runstore import RunColumns
from app.web.charts_contour import band_colours, iso_lines, nice_levels

# Our own palette: ink-blue points, a burnt-orange highlight, red and amber limit lines.
POINT = "#23527c"
HIGHLIGHT = "#d9480f"
LIMIT_FAIL = "#8f1d1d"
LIMIT_REVIEW = "#b07d12"
REFERENCE = "#5d6776"
ISO_LINE = "#1f2d3a"
SURFACE = ["#f3f0e4", "#dfe6c8", "#b9d3b0", "#8dbaa6", "#5f9b9c", "#3d7890", "#2b5678"]
WIDTH, HEIGHT = 360, 240
GRID = 31
# The half-normal plot names at most this many effects besides those beyond Lenth's ME.
HALF_NORMAL_NAMED = 5
# Beyond this many runs in the fit, run-based charts draw bins plus the marked runs.
BIN_ABOVE = 5000


@dataclass(frozen=True)
class Chart:
    """One chart: ``name`` matches a check's ``chart`` field; ``rows`` is its text alternative.
    ``left_out`` lists the runs left out of the fit that the chart also draws (run, run order,
    row, reason; app.web.charts_left_out)."""

    name: str
    title: str
    spec: dict[str, Any]
    columns: tuple[str, ...]
    rows: list[tuple] = field(default_factory=list)
    note: str = ""
    left_out: list[tuple] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "title": self.title, "spec": self.spec, "note": self.note}


def _pick() -> alt.Parameter:
    return alt.selection_point(name="pick", fields=["row"], on="click", clear="dblclick")


def _colour():
    return (alt.when("datum.row === highlight_row").then(alt.value(HIGHLIGHT))
            .otherwise(alt.value(POINT)))


def _size():
    return alt.when("datum.row === highlight_row").then(alt.value(140)).otherwise(alt.value(50))


def _tooltip(*extra: alt.Tooltip) -> list[alt.Tooltip]:
    return [alt.Tooltip("label:N", title="Run"), alt.Tooltip("run_order:O", title="Run order"),
            alt.Tooltip("row:O", title="Row"), *extra]


def _points(x: alt.X, y: alt.Y, *tips: alt.Tooltip) -> alt.Chart:
    return (alt.Chart(name="runs").mark_point(filled=True, opacity=0.9)
            .encode(x=x, y=y, color=_colour(), size=_size(), tooltip=_tooltip(*tips))
            .add_params(_pick()))


def _rules(values: list[dict], colour: str, axis: str = "y", dash=(4, 3)) -> alt.Chart:
    enc = {axis: alt.X("at:Q") if axis == "x" else alt.Y("at:Q")}
    return alt.Chart(alt.Data(values=values)).mark_rule(color=colour, strokeDash=list(dash)
                                                        ).encode(**enc)


def _with_data(chart: alt.TopLevelMixin, data: list[dict],
               extra: dict[str, list[dict]] | None = None) -> dict[str, Any]:
    """Serialise, then attach the rows as named datasets.

    Altair deep-copies inline values on every operation; naming the datasets and adding the
    rows to the finished dict keeps a chart with a thousand grid cells cheap to build.
    """
    spec = chart.to_dict(validate=False)
    spec["datasets"] = {"runs": data, **(extra or {})}
    return spec


def _finish(layers: list[alt.Chart], data: list[dict], title: str) -> dict[str, Any]:
    chart = (alt.layer(*layers, data=alt.NamedData(name="runs"))
             .add_params(alt.param(name="highlight_row", value=0))
             .properties(width=WIDTH, height=HEIGHT, title=title))
    return _with_data(chart, data)


def columns_of(results: dict, cols: RunColumns | None = None) -> RunColumns:
    """The per-run columns: given, or read from a document that still holds per-run objects."""
    if cols is not None:
        return cols
    runs = results.get("runs")
    if runstore.is_summary(runs):
        raise ValueError("this results document keeps its runs in a block: pass the columns")
    return runstore.from_records(runs or [])


def included_runs(cols: RunColumns) -> np.ndarray:
    """Positions of the runs that entered the fit and have residual diagnostics, row order."""
    return np.flatnonzero(cols.included)


_BASE = ("residual", "fitted", "standardized", "studentized", "deleted_studentized", "leverage",
         "cooks_distance")


def _base_rows(cols: RunColumns, idx: np.ndarray) -> list[dict]:
    """One dict per run at positions ``idx`` (column-wise: no per-run object lookups)."""
    order = cols.run_order[idx]
    values = {name: cols.values[name][idx].tolist() for name in _BASE}
    fields = {"row": cols.row[idx].tolist(), "label": cols.labels(idx),
              "run_order": [None if not np.isfinite(v) else int(v) for v in order.tolist()],
              **values}
    names = list(fields)
    return [dict(zip(names, vals, strict=True)) for vals in zip(*fields.values(), strict=True)]


def _r(v: Any, digits: int = 4) -> Any:
    return round(v, digits) if isinstance(v, float) else v


def normal_probability(results: dict, cols: RunColumns | None = None) -> Chart:
    """Residuals against Blom normal scores, reference line through the quartiles."""
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    order = np.argsort([d["residual"] for d in data], kind="stable")
    n = len(data)
    scores = stats.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25))
    for rank, i in enumerate(order):
        data[i]["normal_score"] = float(scores[rank])
    res = np.array([d["residual"] for d in data])
    q1, q3 = np.percentile(res, [25, 75])
    z1, z3 = stats.norm.ppf([0.25, 0.75])
    slope = (q3 - q1) / (z3 - z1)
    ends = [float(scores[0]), float(scores[-1])]
    line = alt.Chart(alt.Data(values=[{"z": z, "ref": float(q1 + slope * (z - z1))}
                                      for z in ends])).mark_line(color=REFERENCE).encode(
        x="z:Q", y="ref:Q")
    pts = _points(alt.X("normal_score:Q", title="Normal score"), alt.Y("residual:Q",
                  title="Residual"), alt.Tooltip("residual:Q", format=".3g", title="Residual"))
    spec = _finish([line, pts], data, "Normal probability plot of residuals")
    rows = [(d["label"], d["run_order"], _r(d["normal_score"]), _r(d["residual"]))
            for d in sorted(data, key=lambda d: d["normal_score"])]
    return Chart("normal_probability", "Normal probability plot", spec,
                 ("Run", "Run order", "Normal score", "Residual"), rows,
                 "Reference line through the first and third quartiles.")


def histogram(results: dict, cols: RunColumns | None = None) -> Chart:
    """Histogram of residuals (bins chosen by Vega-Lite), points underneath for the runs."""
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    bars = alt.Chart(name="bins").mark_bar(color="#9fb6cc").encode(
        x=alt.X("residual:Q", bin=alt.Bin(maxbins=10), title="Residual"),
        y=alt.Y("count():Q", title="Runs"))
    ticks = (alt.Chart(name="runs").mark_tick(thickness=2).encode(
        x="residual:Q", y=alt.value(HEIGHT), color=_colour(), tooltip=_tooltip())
        .add_params(_pick()))
    spec = _with_data(alt.layer(bars, ticks, data=alt.NamedData(name="runs"))
                      .add_params(alt.param(name="highlight_row", value=0))
                      .properties(width=WIDTH, height=HEIGHT, title="Histogram of residuals"),
                      data)
    rows = [(d["label"], d["run_order"], _r(d["residual"])) for d in data]
    return Chart("histogram", "Histogram of residuals", spec, ("Run", "Run order", "Residual"),
                 rows)


def residuals_vs_fitted(results: dict, cols: RunColumns | None = None) -> Chart:
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    pts = _points(alt.X("fitted:Q", title="Fitted value", scale=alt.Scale(zero=False)),
                  alt.Y("residual:Q", title="Residual"),
                  alt.Tooltip("fitted:Q", format=".4g", title="Fitted"),
                  alt.Tooltip("residual:Q", format=".3g", title="Residual"))
    spec = _finish([_rules([{"at": 0}], REFERENCE, dash=(1, 0)), pts], data,
                   "Residuals against fitted values")
    rows = [(d["label"], d["run_order"], _r(d["fitted"]), _r(d["residual"])) for d in data]
    return Chart("residuals_vs_fitted", "Residuals against fitted values", spec,
                 ("Run", "Run order", "Fitted", "Residual"), rows)


def level_names(results: dict, factor: str) -> list[str] | None:
    """A categorical factor's level names in their order (None for a continuous factor)."""
    for f in results.get("model", {}).get("factors", []):
        if f["name"] == factor and f.get("levels") is not None:
            return list(f["levels"])
    return None


def _level_rows(cols: RunColumns, factor: str, names: list[str] | None = None) -> list[dict]:
    """The included runs' chart rows, each with its setting of ``factor`` as ``level`` (its
    level name for a categorical factor, whose stored setting is the level number) and
    ``level_order`` to sort by."""
    idx = included_runs(cols)
    data = _base_rows(cols, idx)
    for d, level in zip(data, cols.actual[factor][idx].tolist(), strict=True):
        d["level_order"] = level
        d["level"] = names[int(level) - 1] if names else level
    return data


def residuals_vs_factor(results: dict, factor: str, cols: RunColumns | None = None) -> Chart:
    names = level_names(results, factor)
    data = _level_rows(columns_of(results, cols), factor, names)
    # a categorical factor's levels sit on a nominal axis, in their own order
    x = (alt.X("level:N", title=factor, sort=names) if names
         else alt.X("level:Q", title=factor, scale=alt.Scale(zero=False)))
    pts = _points(x, alt.Y("residual:Q", title="Residual"),
                  alt.Tooltip("level:N" if names else "level:Q", title=factor))
    spec = _finish([_rules([{"at": 0}], REFERENCE, dash=(1, 0)), pts], data,
                   f"Residuals against {factor}")
    rows = [(d["label"], d["run_order"], d["level"], _r(d["residual"])) for d in data]
    return Chart(f"residuals_vs_factor:{factor}", f"Residuals against {factor}", spec,
                 ("Run", "Run order", factor, "Residual"), rows)


def residuals_vs_covariate(results: dict, covariate: str, values: dict[int, Any],
                           cols: RunColumns | None = None) -> Chart:
    """Residuals against a recorded column left out of the model (values by row)."""
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    numeric = all(isinstance(values.get(d["row"]), int | float) for d in data)
    for d in data:
        d["value"] = values.get(d["row"])
    x = (alt.X("value:Q", title=covariate, scale=alt.Scale(zero=False)) if numeric
         else alt.X("value:N", title=covariate))
    pts = _points(x, alt.Y("residual:Q", title="Residual"),
                  alt.Tooltip("value:Q" if numeric else "value:N", title=covariate))
    spec = _finish([_rules([{"at": 0}], REFERENCE, dash=(1, 0)), pts], data,
                   f"Residuals against {covariate}")
    rows = [(d["label"], d["run_order"], d["value"], _r(d["residual"])) for d in data]
    return Chart(f"residuals_vs_covariate:{covariate}", f"Residuals against {covariate}", spec,
                 ("Run", "Run order", covariate, "Residual"), rows)


def _outlier_limit(results: dict) -> float:
    """The outlier check's limit, on the residual kind the check uses (internally studentized)."""
    return _check(results, "outliers").get("details", {}).get("limit", 2.5)


def run_order(results: dict, cols: RunColumns | None = None) -> Chart | None:
    """Studentized residuals in run order, joined, with the outlier check's ± limit lines."""
    cols = columns_of(results, cols)
    data = [d for d in _base_rows(cols, included_runs(cols)) if d["run_order"] is not None]
    if not data:
        return None
    limit = _outlier_limit(results)
    line = alt.Chart(name="path").mark_line(color="#9fb6cc").encode(
        x="run_order:Q", y="studentized:Q", order="run_order:Q")
    pts = _points(alt.X("run_order:Q", title="Run order"),
                  alt.Y("studentized:Q", title="Studentized residual"),
                  alt.Tooltip("studentized:Q", format=".3g", title="Studentized"))
    limits = [_rules([{"at": 0}], REFERENCE, dash=(1, 0)),
              _rules([{"at": -limit}, {"at": limit}], LIMIT_REVIEW)]
    spec = _finish([*limits, line, pts], data, "Studentized residuals in run order")
    rows = [(d["label"], d["run_order"], _r(d["studentized"]))
            for d in sorted(data, key=lambda d: d["run_order"])]
    return Chart("run_order", "Studentized residuals in run order", spec,
                 ("Run", "Run order", "Studentized residual"), rows,
                 f"Dashed lines at ±{limit:g}: the runs the outlier check marks lie beyond them.")


def spread_by_level(results: dict, factor: str, cols: RunColumns | None = None) -> Chart:
    """Residuals at each level of a factor with each level's ±1 SD bar."""
    names = level_names(results, factor)
    data = _level_rows(columns_of(results, cols), factor, names)
    by_level: dict[Any, list[float]] = {}
    for d in sorted(data, key=lambda d: d["level_order"]):
        by_level.setdefault(d["level"], []).append(d["residual"])
    spread = [{"level": lv, "sd": float(np.std(v, ddof=1)) if len(v) > 1 else None,
               "lo": float(np.mean(v) - np.std(v, ddof=1)) if len(v) > 1 else None,
               "hi": float(np.mean(v) + np.std(v, ddof=1)) if len(v) > 1 else None,
               "n": len(v)} for lv, v in by_level.items()]
    # a categorical factor's levels in their own order; numbers ascending (left unsorted, the
    # levels with a bar would come first and the others after them)
    order = names if names is not None else "ascending"
    bars = alt.Chart(alt.Data(values=[s for s in spread if s["sd"] is not None])).mark_rule(
        color="#9fb6cc", strokeWidth=8, opacity=0.7).encode(
        x=alt.X("level:O", sort=order), y="lo:Q", y2="hi:Q",
        tooltip=[alt.Tooltip("level:O", title=factor), alt.Tooltip("sd:Q", format=".3g",
                                                                   title="SD"),
                 alt.Tooltip("n:Q", title="Runs")])
    pts = _points(alt.X("level:O", title=factor, sort=order), alt.Y("residual:Q", title="Residual"),
                  alt.Tooltip("level:O", title=factor))
    spec = _finish([bars, pts], data, f"Spread of residuals by {factor} level")
    sd_at = {s["level"]: s["sd"] for s in spread}
    rows = [(d["label"], d["run_order"], d["level"], _r(d["residual"]), _r(sd_at[d["level"]]))
            for d in sorted(data, key=lambda d: (d["level_order"], d["row"]))]
    return Chart(f"spread_by_level:{factor}", f"Spread by {factor} level", spec,
                 ("Run", "Run order", factor, "Residual", "Residual SD at this level"), rows,
                 "Bars show mean ± 1 SD at each level.")


def _check(results: dict, check_id: str) -> dict:
    return next((c for c in results.get("checks", []) if c["id"] == check_id), {})


def cooks_distance(results: dict, cols: RunColumns | None = None) -> Chart:
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    limit = _check(results, "influence").get("details", {}).get("cooks_review_limit")
    bars = (alt.Chart(name="runs").mark_bar().encode(
        x=alt.X("row:O", title="Row"), y=alt.Y("cooks_distance:Q", title="Cook's distance"),
        color=_colour(),
        tooltip=_tooltip(alt.Tooltip("cooks_distance:Q", format=".3g", title="Cook's distance")))
        .add_params(_pick()))
    layers = [bars] + ([_rules([{"at": limit}], LIMIT_REVIEW)] if limit else [])
    spec = _finish(layers, data, "Cook's distance by run")
    rows = [(d["label"], d["run_order"], d["row"], _r(d["cooks_distance"])) for d in data]
    return Chart("cooks_distance", "Cook's distance by run", spec,
                 ("Run", "Run order", "Row", "Cook's distance"), rows,
                 "" if not limit else f"Dashed line: review limit {limit:.3g} (F median).")


def leverage_limits(results: dict) -> tuple[list, str]:
    """The leverage chart's lines and the note saying what they are: 2p/n (common practice)
    and the outlier check's limits. A run's leverage is at most 1, so when 2p/n is 1 or more
    (a small design) that line would mark nothing and is left out, with the reason."""
    p, n = results["fit"]["p"], results["fit"]["n"]
    limit = _outlier_limit(results)
    outliers = _rules([{"at": -limit}, {"at": limit}], LIMIT_REVIEW)
    if 2 * p / n >= 1:
        return [outliers], (f"No 2p/n line: 2p/n = {2 * p / n:.3g} is at or above 1, the "
                            "largest leverage a run can have, so in a design this small the "
                            f"rule marks no run. Horizontal lines at ±{limit:g}, the outlier "
                            "check's limit.")
    return ([_rules([{"at": 2 * p / n}], LIMIT_REVIEW, axis="x"), outliers],
            f"Vertical line at 2p/n = {2 * p / n:.3g}; horizontal lines at ±{limit:g}, the "
            "outlier check's limit.")


def leverage(results: dict, cols: RunColumns | None = None) -> Chart:
    """Leverage against studentized residual, with the 2p/n line and the outlier limits."""
    cols = columns_of(results, cols)
    data = _base_rows(cols, included_runs(cols))
    lines, note = leverage_limits(results)
    pts = _points(alt.X("leverage:Q", title="Leverage h"),
                  alt.Y("studentized:Q", title="Studentized residual"),
                  alt.Tooltip("leverage:Q", format=".3f", title="Leverage"),
                  alt.Tooltip("studentized:Q", format=".3g", title="Studentized"))
    spec = _finish([*lines, pts], data, "Leverage against studentized residual")
    rows = [(d["label"], d["run_order"], _r(d["leverage"]), _r(d["studentized"]))
            for d in data]
    return Chart("leverage", "Leverage against studentized residual", spec,
                 ("Run", "Run order", "Leverage", "Studentized residual"), rows, note)


def half_normal(results: dict) -> Chart | None:
    """|effect| against half-normal quantile with Lenth's ME and SME lines."""
    points, lenth = results.get("half_normal") or [], results.get("lenth")
    if not points:
        return None
    # Name only the effects that stand out (beyond Lenth's ME, or the largest few): the small
    # ones crowd together near zero and their names would print over each other. Names of the
    # right-hand points go to their left, so that none runs out of the plot.
    ranked = sorted(points, key=lambda p: -p["abs_effect"])
    named = {p["term"] for p in ranked[:HALF_NORMAL_NAMED]}
    if lenth:
        named |= {p["term"] for p in points if p["abs_effect"] >= lenth["me"]}
    right = max(p["quantile"] for p in points) * 0.6
    data = [{"term": p["term"], "abs_effect": p["abs_effect"], "quantile": p["quantile"],
             "name": p["term"] if p["term"] in named else "",
             "side": "left" if p["quantile"] > right else "right"} for p in points]
    dots = alt.Chart(name="effects").mark_point(filled=True, color=POINT, size=60).encode(
        x=alt.X("quantile:Q", title="Half-normal quantile"),
        y=alt.Y("abs_effect:Q", title="|Effect|"),
        tooltip=[alt.Tooltip("term:N", title="Term"),
                 alt.Tooltip("abs_effect:Q", format=".4g", title="|Effect|")])
    labels = [alt.Chart().transform_filter(f"datum.side === '{side}'")
              .mark_text(align=align, dx=dx, fontSize=10, color=REFERENCE)
              .encode(x="quantile:Q", y="abs_effect:Q", text="name:N")
              for side, align, dx in (("right", "left", 6), ("left", "right", -6))]
    layers = [dots, *labels]
    note = ""
    if lenth:
        layers += [_rules([{"at": lenth["me"]}], LIMIT_REVIEW), _rules([{"at": lenth["sme"]}],
                                                                        LIMIT_FAIL)]
        note = (f"Lenth PSE {lenth['pse']:.4g}; ME {lenth['me']:.4g} (amber), "
                f"SME {lenth['sme']:.4g} (red).")
    spec = _with_data(alt.layer(*layers, data=alt.NamedData(name="runs")).properties(
        width=WIDTH, height=HEIGHT, title="Half-normal plot of effects"), data)
    rows = [(d["term"], _r(d["quantile"]), _r(d["abs_effect"])) for d in data]
    return Chart("half_normal", "Half-normal plot of effects", spec,
                 ("Term", "Half-normal quantile", "|Effect|"), rows, note)


def boxcox_profile(results: dict) -> Chart | None:
    """Profile log-likelihood over lambda with the 95 % cut-off and the CI ends."""
    box = results.get("boxcox") or {}
    profile = box.get("profile") or []
    if not profile:
        return None
    data = [{"lambda": p["lambda"], "log_likelihood": p["log_likelihood"]} for p in profile
            if p["log_likelihood"] is not None]
    top = max(d["log_likelihood"] for d in data)
    cut = top - stats.chi2.ppf(0.95, 1) / 2
    line = alt.Chart(name="profile").mark_line(color=POINT, point=True).encode(
        x=alt.X("lambda:Q", title="λ"), y=alt.Y("log_likelihood:Q", title="Log-likelihood",
                                                scale=alt.Scale(zero=False)),
        tooltip=[alt.Tooltip("lambda:Q", format=".2f", title="λ"),
                 alt.Tooltip("log_likelihood:Q", format=".4g", title="Log-likelihood")])
    layers = [line, _rules([{"at": cut}], LIMIT_REVIEW)]
    ci = [v for v in box.get("ci") or [] if v is not None]
    if ci:
        layers.append(_rules([{"at": v} for v in ci], LIMIT_REVIEW, axis="x"))
    if box.get("lambda_hat") is not None:
        layers.append(_rules([{"at": box["lambda_hat"]}], REFERENCE, axis="x", dash=(1, 0)))
    spec = _with_data(alt.layer(*layers, data=alt.NamedData(name="runs")).properties(
        width=WIDTH, height=HEIGHT, title="Box–Cox profile"), data)
    rows = [(_r(d["lambda"], 2), _r(d["log_likelihood"])) for d in data]
    return Chart("boxcox_profile", "Box–Cox profile", spec, ("λ", "Log-likelihood"), rows,
                 box.get("message") or "")


def predict_grid(model: dict, settings: dict[str, np.ndarray]) -> np.ndarray:
    """Predicted response (back-transformed) at many settings at once, from the stored model.

    The model rows come from ``app.analysis.prediction.model_rows`` (x'b in coded units, blocks
    averaged out), then the inverse transform; a categorical factor not given a level name is
    averaged over its levels (the mean of its sum-to-zero columns over the levels is zero, as
    for blocks). tests/web/test_charts.py checks it against predict.
    """
    coded, choices = {}, []
    for f in model["factors"]:
        v = settings[f["name"]]
        if f.get("levels") is not None:
            given = isinstance(v, str)
            choices.append((f["name"], [f["levels"].index(v) + 1] if given
                            else range(1, len(f["levels"]) + 1)))
            continue
        v = np.asarray(v, dtype=float)
        if f.get("low") is None:
            coded[f["name"]] = v
        else:
            centre, half = (f["low"] + f["high"]) / 2.0, (f["high"] - f["low"]) / 2.0
            coded[f["name"]] = (v - centre) / half
    shape = np.broadcast(*coded.values()).shape if coded else ()
    b = np.asarray(model["coefficients"], dtype=float)
    combos = list(itertools.product(*(levels for _, levels in choices)))
    z = np.zeros(int(np.prod(shape)))
    for combo in combos:
        values = {n: np.broadcast_to(v, shape) for n, v in coded.items()}
        values.update({n: np.full(shape, float(level))
                       for (n, _), level in zip(choices, combo, strict=True)})
        z += model_rows(model, values) @ b
    z = (z / len(combos)).reshape(shape)
    with np.errstate(all="ignore"):
        out = transforms.inverse(z, model.get("transform", "none"), model.get("lambda"))
    return np.asarray(out, dtype=float)


def contour(results: dict, x_factor: str, y_factor: str,
            cols: RunColumns | None = None) -> Chart:
    """Fitted response over two continuous factors (others at their centre, categorical ones
    averaged over their levels) with the design points."""
    model = results["model"]
    factors = {f["name"]: f for f in model["factors"]}
    cols = columns_of(results, cols)
    span = {}
    for name in (x_factor, y_factor):
        values = cols.actual[name]
        span[name] = np.linspace(np.nanmin(values), np.nanmax(values), GRID)
    gx, gy = np.meshgrid(span[x_factor], span[y_factor])
    settings = {}
    for name, f in factors.items():
        centre = 0.0 if f.get("low") is None else (f["low"] + f["high"]) / 2.0
        settings[name] = gx if name == x_factor else gy if name == y_factor else centre
    z = predict_grid(model, settings)
    dx = (span[x_factor][1] - span[x_factor][0]) / 2
    dy = (span[y_factor][1] - span[y_factor][0]) / 2
    cells = [{"x": float(a) - dx, "x2": float(a) + dx, "y": float(b) - dy, "y2": float(b) + dy,
              "predicted": None if not np.isfinite(c) else round(float(c), 4)}
             for a, b, c in zip(gx.ravel(), gy.ravel(), z.ravel(), strict=True)]
    response = results.get("response", "response")
    levels = nice_levels(z).tolist()
    # the colour bands change exactly where the labelled lines run
    band_scale = (alt.Scale(type="threshold", domain=levels,
                            range=band_colours(SURFACE, len(levels) + 1)) if levels
                  else alt.Scale(type="quantize", range=SURFACE))
    heat = alt.Chart(alt.NamedData(name="surface"), name="surface").mark_rect().encode(
        x=alt.X("x:Q", title=x_factor, scale=alt.Scale(zero=False, nice=False),
                axis=alt.Axis(grid=False)), x2="x2:Q",
        y=alt.Y("y:Q", title=y_factor, scale=alt.Scale(zero=False, nice=False),
                axis=alt.Axis(grid=False)), y2="y2:Q",
        color=alt.Color("predicted:Q", title=f"Predicted {response}", scale=band_scale),
        tooltip=[alt.Tooltip("predicted:Q", format=".4g", title=f"Predicted {response}")])
    data = _design_points(cols, x_factor, y_factor)
    pts = (alt.Chart(name="runs").mark_point(filled=True, stroke="#ffffff", strokeWidth=1)
           .encode(x="px:Q", y="py:Q", color=_colour(), size=_size(),
                   tooltip=_tooltip(alt.Tooltip("observed:Q", title=f"Observed {response}")))
           .add_params(_pick()))
    segments, labels = iso_lines(span[x_factor], span[y_factor], z.reshape(gx.shape))
    lines = alt.Chart(alt.NamedData(name="iso")).mark_rule(color=ISO_LINE, strokeWidth=1).encode(
        x="x:Q", y="y:Q", x2="x2:Q", y2="y2:Q")
    label_at = {"x": "x:Q", "y": "y:Q", "text": "text:N"}
    halo = alt.Chart(alt.NamedData(name="iso_labels")).mark_text(
        fontSize=10, stroke="#ffffff", strokeWidth=3, strokeOpacity=0.85).encode(**label_at)
    values = alt.Chart(alt.NamedData(name="iso_labels")).mark_text(
        fontSize=10, color=ISO_LINE).encode(**label_at)
    held = held_words(factors, (x_factor, y_factor))
    title = f"Fitted {response} over {x_factor} and {y_factor}"
    spec = _with_data(alt.layer(heat, lines, halo, values, pts, data=alt.NamedData(name="runs"))
                      .add_params(alt.param(name="highlight_row", value=0))
                      .properties(width=WIDTH, height=HEIGHT,
                                  title=alt.Title(title, subtitle=held) if held else title),
                      data, {"surface": cells, "iso": segments, "iso_labels": labels})
    rows = [(d["label"], d["run_order"], d["px"], d["py"], d["observed"]) for d in data]
    levels = ", ".join(d["text"] for d in labels)
    note = " ".join(part for part in (
        f"{held}." if held else "",
        f"Lines where the predicted {response} is {levels}." if labels else "") if part)
    return Chart("contour", title, spec,
                 ("Run", "Run order", x_factor, y_factor, f"Observed {response}"), rows, note)


def held_words(factors: dict[str, dict], shown: tuple[str, str]) -> str:
    """How the factors not on the contour's axes are held: a value (the centre, in natural
    units) or, for a categorical factor, averaged over its levels."""
    parts = []
    for name, f in factors.items():
        if name in shown:
            continue
        if f.get("levels") is not None:
            parts.append(f"{name} averaged over its levels")
        else:
            centre = 0.0 if f.get("low") is None else (f["low"] + f["high"]) / 2.0
            parts.append(f"{name} at {centre:g}" + (f" {f['units']}" if f.get("units") else ""))
    return ("Held: " + "; ".join(parts)) if parts else ""


def _design_points(cols: RunColumns, x_factor: str, y_factor: str) -> list[dict]:
    idx = np.flatnonzero(~cols.excluded)
    order = cols.run_order[idx].tolist()
    return [{"row": row, "label": label, "run_order": None if o != o else int(o),
             "px": px, "py": py, "observed": obs}
            for row, label, o, px, py, obs in zip(
                cols.row[idx].tolist(), cols.labels(idx), order,
                cols.actual[x_factor][idx].tolist(), cols.actual[y_factor][idx].tolist(),
                [None if v != v else v for v in cols.values["observed"][idx].tolist()],
                strict=True)]


def all_charts(results: dict, *, pair: tuple[str, str] | None = None,
               covariates: dict[str, dict[int, Any]] | None = None,
               cols: RunColumns | None = None) -> list[Chart]:
    """Every chart that applies to this fit, in reading order. Beyond ``binned.BIN_ABOVE``
    runs the run-based charts draw bins with the marked runs on top (app.web.charts_binned)."""
    from app.web.charts_binned import binned_charts, binned_contour
    from app.web.charts_effects import interactions, main_effects
    from app.web.charts_left_out import add_left_out, contour_fields

    cols = columns_of(results, cols)
    factor_names = [f["name"] for f in results["factors"]]
    # the surface is drawn over two continuous factors (categorical ones are averaged over)
    continuous = [f for f in factor_names if level_names(results, f) is None]
    out: list[Chart | None] = []
    used = int(cols.included.sum())
    if used > BIN_ABOVE:
        out += binned_charts(results, cols, factor_names, covariates or {})
    elif used:
        out += [normal_probability(results, cols), histogram(results, cols),
                residuals_vs_fitted(results, cols), run_order(results, cols)]
        out += [residuals_vs_factor(results, f, cols) for f in factor_names]
        out += [spread_by_level(results, f, cols) for f in factor_names]
        out += [residuals_vs_covariate(results, name, values, cols)
                for name, values in (covariates or {}).items()]
        out += [cooks_distance(results, cols), leverage(results, cols)]
    # every chart so far draws runs: the left-out ones join them, hollow and grey
    out = [add_left_out(c, results, cols, covariates) if c else None for c in out]
    out += [main_effects(results, cols), interactions(results, cols)]
    out += [half_normal(results), boxcox_profile(results)]
    if pair and not set(pair) <= set(continuous):
        pair = None
    if len(continuous) >= 2:
        x, y = pair if pair else (continuous[0], continuous[1])
        surface = (contour(results, x, y, cols) if len(cols) <= BIN_ABOVE
                   else binned_contour(results, x, y, cols))
        out.append(add_left_out(surface, results, cols, fields=contour_fields(x, y)))
    return [c for c in out if c is not None]
