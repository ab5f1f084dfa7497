"""Run-based charts for fits with many runs: shaded bins, with the marked runs as points on top.

Beyond ``charts.BIN_ABOVE`` runs a point per run is neither readable nor cheap to send. Each
chart keeps its name, title, axes and limit lines, but draws:

* scatter charts: a two-dimensional histogram (darker cells hold more runs);
* the histogram of residuals: bars computed here;
* the run-order chart: per run-order bin, the band from lowest to highest studentized residual
  and the band between its quartiles, with the median joined;
* spread by level: per level the ±1 SD bar and the lowest-to-highest rule (bins when a factor
  has more than ``MAX_LEVELS`` levels);
* Cook's distance: the largest value in each bin of rows.

On top, as points that can be picked and highlighted like every run elsewhere, go the marked
runs: those a check flagged (outliers, influential runs, …), at most ``MARK_MAX`` of them, the
most extreme studentized residuals first. Each chart's note says that it shows bins, how many
runs they hold and how many are drawn as points; its data table lists the first marked runs and
points to the per-run CSV for the rest.
"""

from __future__ import annotations

from typing import Any

import altair as alt
import numpy as np
from scipy import stats

from app.analysis.runstore import RunColumns
from app.web.charts import (
    HEIGHT,
    LIMIT_REVIEW,
    REFERENCE,
    WIDTH,
    Chart,
    _check,
    _outlier_limit,
    _points,
    _r,
    _rules,
    _with_data,
    contour,
    included_runs,
    leverage_limits,
)

MARK_MAX = 300
TABLE_ROWS = 50
MAX_LEVELS = 30
XBINS, YBINS = 48, 32
ORDER_BINS = 200
BIN_FILL = "#9fb6cc"
DENSITY = ["#e8eef4", "#c4d4e3", "#9fb6cc", "#6f93b3", "#46709a", "#23527c"]


def _marked(cols: RunColumns, idx: np.ndarray) -> tuple[np.ndarray, int]:
    """Positions (within ``idx``) of the flagged runs to draw as points, and how many there are."""
    flagged = np.isin(cols.row[idx], np.fromiter(cols.flags, dtype=np.int64, count=len(cols.flags)))
    where = np.flatnonzero(flagged)
    if len(where) > MARK_MAX:
        extreme = np.abs(np.nan_to_num(cols.values["studentized"][idx][where]))
        where = np.sort(where[np.argsort(-extreme, kind="stable")[:MARK_MAX]])
    return where, int(flagged.sum())


def _mark_rows(cols: RunColumns, index: np.ndarray, **fields: np.ndarray) -> list[dict]:
    """The marked runs' rows: row, label and run order plus only the fields a chart draws."""
    order = [None if v != v else int(v) for v in cols.run_order[index].tolist()]
    columns = {"row": cols.row[index].tolist(), "label": cols.labels(index), "run_order": order,
               **{k: [_r(v, 6) for v in a.tolist()] for k, a in fields.items()}}
    names = list(columns)
    return [dict(zip(names, vals, strict=True)) for vals in zip(*columns.values(), strict=True)]


def _marked_words(drawn: int, flagged: int) -> str:
    return (f"{drawn} most extreme of {flagged} flagged runs" if flagged > drawn
            else f"{drawn} flagged runs")


def _note(n: int, drawn: int, flagged: int, extra: str = "") -> str:
    more = (f"; the {_marked_words(drawn, flagged)} are drawn as points" if drawn
            else "; no run is flagged")
    return (f"{n:,} runs, shown as shaded bins (darker holds more runs){more}. The data table "
            f"lists the first {TABLE_ROWS} of them; every run is in the per-run CSV."
            + (f" {extra}" if extra else ""))


def _cells(x: np.ndarray, y: np.ndarray) -> list[dict[str, Any]]:
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if not len(x):
        return []
    xr = (float(x.min()), float(x.max()) if x.max() > x.min() else float(x.min()) + 1.0)
    yr = (float(y.min()), float(y.max()) if y.max() > y.min() else float(y.min()) + 1.0)
    counts, xe, ye = np.histogram2d(x, y, bins=[XBINS, YBINS], range=[xr, yr])
    i, j = np.nonzero(counts)
    return [{"x": float(xe[a]), "x2": float(xe[a + 1]), "y": float(ye[b]), "y2": float(ye[b + 1]),
             "runs": int(counts[a, b])} for a, b in zip(i.tolist(), j.tolist(), strict=True)]


def _density(x_title: str, y_title: str) -> alt.Chart:
    return alt.Chart(alt.NamedData(name="bins"), name="bins").mark_rect().encode(
        x=alt.X("x:Q", title=x_title, scale=alt.Scale(zero=False)), x2="x2:Q",
        y=alt.Y("y:Q", title=y_title, scale=alt.Scale(zero=False)), y2="y2:Q",
        color=alt.Color("runs:Q", title="Runs", scale=alt.Scale(type="log", range=DENSITY)),
        tooltip=[alt.Tooltip("runs:Q", title="Runs in this cell")])


def _layered(layers: list[alt.Chart], marked: list[dict], bins: list[dict],
             title: str) -> dict[str, Any]:
    chart = (alt.layer(*layers, data=alt.NamedData(name="runs"))
             .add_params(alt.param(name="highlight_row", value=0))
             .properties(width=WIDTH, height=HEIGHT, title=title))
    return _with_data(chart, marked, {"bins": bins})


def _scatter(name: str, title: str, cols: RunColumns, idx: np.ndarray, x: np.ndarray,
             y: np.ndarray, fields: tuple[str, str], titles: tuple[str, str],
             rules: list[alt.Chart], columns: tuple[str, ...], extra: str = "") -> Chart:
    """A binned scatter of y against x (arrays over ``idx``) with the marked runs on top."""
    where, flagged = _marked(cols, idx)
    data = _mark_rows(cols, idx[where], **{fields[0]: x[where], fields[1]: y[where]})
    pts = _points(alt.X(f"{fields[0]}:Q", title=titles[0], scale=alt.Scale(zero=False)),
                  alt.Y(f"{fields[1]}:Q", title=titles[1]),
                  alt.Tooltip(f"{fields[0]}:Q", format=".4g", title=titles[0]),
                  alt.Tooltip(f"{fields[1]}:Q", format=".3g", title=titles[1]))
    spec = _layered([_density(*titles), *rules, pts], data, _cells(x, y), title)
    rows = [(d["label"], d["run_order"], _r(d[fields[0]]), _r(d[fields[1]]))
            for d in data[:TABLE_ROWS]]
    return Chart(name, _short(name, title), spec, columns, rows,
                 _note(len(idx), len(where), flagged, extra))


def _short(name: str, title: str) -> str:
    return {"normal_probability": "Normal probability plot",
            "leverage": "Leverage against studentized residual"}.get(name, title)


def normal_probability(results: dict, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    res = cols.values["residual"][idx]
    n = len(res)
    rank = np.empty(n, dtype=np.int64)
    rank[np.argsort(res, kind="stable")] = np.arange(n)
    scores = stats.norm.ppf((rank + 1 - 0.375) / (n + 0.25))
    q1, q3 = np.percentile(res, [25, 75])
    z1, z3 = stats.norm.ppf([0.25, 0.75])
    slope = (q3 - q1) / (z3 - z1)
    ends = [float(scores.min()), float(scores.max())]
    line = alt.Chart(alt.Data(values=[{"z": z, "ref": float(q1 + slope * (z - z1))}
                                      for z in ends])).mark_line(color=REFERENCE).encode(
        x="z:Q", y="ref:Q")
    return _scatter("normal_probability", "Normal probability plot of residuals", cols, idx,
                    scores, res, ("normal_score", "residual"), ("Normal score", "Residual"),
                    [line], ("Run", "Run order", "Normal score", "Residual"),
                    "Reference line through the first and third quartiles.")


def residuals_vs_fitted(results: dict, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    return _scatter("residuals_vs_fitted", "Residuals against fitted values", cols, idx,
                    cols.values["fitted"][idx], cols.values["residual"][idx],
                    ("fitted", "residual"), ("Fitted value", "Residual"),
                    [_rules([{"at": 0}], REFERENCE, dash=(1, 0))],
                    ("Run", "Run order", "Fitted", "Residual"))


def residuals_vs_factor(results: dict, factor: str, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    return _scatter(f"residuals_vs_factor:{factor}", f"Residuals against {factor}", cols, idx,
                    cols.actual[factor][idx], cols.values["residual"][idx], ("level", "residual"),
                    (factor, "Residual"), [_rules([{"at": 0}], REFERENCE, dash=(1, 0))],
                    ("Run", "Run order", factor, "Residual"))


def residuals_vs_covariate(results: dict, covariate: str, values: dict[int, Any],
                           cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    raw = [values.get(r) for r in cols.row[idx].tolist()]
    if all(isinstance(v, int | float) for v in raw):
        x = np.asarray(raw, dtype=float)
        return _scatter(f"residuals_vs_covariate:{covariate}", f"Residuals against {covariate}",
                        cols, idx, x, cols.values["residual"][idx], ("value", "residual"),
                        (covariate, "Residual"), [_rules([{"at": 0}], REFERENCE, dash=(1, 0))],
                        ("Run", "Run order", covariate, "Residual"))
    return _by_level(f"residuals_vs_covariate:{covariate}", f"Residuals against {covariate}",
                     covariate, cols, idx, np.asarray([str(v) for v in raw], dtype=object))


def _by_level(name: str, title: str, label: str, cols: RunColumns, idx: np.ndarray,
              level: np.ndarray) -> Chart:
    """Per level: the ±1 SD bar, the lowest-to-highest rule; marked runs on top."""
    res = cols.values["residual"][idx]
    levels, inverse = np.unique(level, return_inverse=True)
    counts = np.bincount(inverse)
    sums = np.bincount(inverse, weights=res)
    mean = sums / counts
    var = np.bincount(inverse, weights=(res - mean[inverse]) ** 2) / np.maximum(counts - 1, 1)
    sd = np.sqrt(var)
    lo = np.full(len(levels), np.inf)
    hi = np.full(len(levels), -np.inf)
    np.minimum.at(lo, inverse, res)
    np.maximum.at(hi, inverse, res)
    spread = [{"level": _plain(lv), "n": int(c), "sd": float(s) if c > 1 else None,
               "lo": float(m - s) if c > 1 else None, "hi": float(m + s) if c > 1 else None,
               "min": float(a), "max": float(b)}
              for lv, c, m, s, a, b in zip(levels.tolist(), counts, mean, sd, lo, hi,
                                           strict=True)]
    ranges = alt.Chart(alt.NamedData(name="bins")).mark_rule(color=REFERENCE).encode(
        x=alt.X("level:O", title=label), y="min:Q", y2="max:Q")
    bars = alt.Chart(alt.NamedData(name="bins")).mark_rule(
        color=BIN_FILL, strokeWidth=8, opacity=0.8).encode(
        x=alt.X("level:O"), y="lo:Q", y2="hi:Q",
        tooltip=[alt.Tooltip("level:O", title=label), alt.Tooltip("sd:Q", format=".3g",
                                                                  title="SD"),
                 alt.Tooltip("n:Q", title="Runs")])
    where, flagged = _marked(cols, idx)
    data = _mark_rows(cols, idx[where], residual=res[where])
    for d, lv in zip(data, level[where].tolist(), strict=True):
        d["level"] = _plain(lv)
    pts = _points(alt.X("level:O", title=label), alt.Y("residual:Q", title="Residual"),
                  alt.Tooltip("level:O", title=label))
    spec = _layered([ranges, bars, pts], data, [s for s in spread if s["sd"] is not None],
                    title)
    rows = [(s["level"], s["n"], _r(s["sd"]), _r(s["min"]), _r(s["max"])) for s in spread]
    return Chart(name, title, spec, (label, "Runs", "Residual SD", "Lowest residual",
                                     "Highest residual"), rows[:TABLE_ROWS],
                 f"{len(idx):,} runs in {len(levels)} levels: bars show mean ± 1 SD at each "
                 "level, thin lines the lowest to highest residual; the "
                 f"{_marked_words(len(where), flagged)} are drawn as points. The data table "
                 "lists the levels.")


def _plain(value: Any) -> Any:
    return value.item() if hasattr(value, "item") else value


def spread_by_level(results: dict, factor: str, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    level = cols.actual[factor][idx]
    name, title = f"spread_by_level:{factor}", f"Spread of residuals by {factor} level"
    if len(np.unique(level)) <= MAX_LEVELS:
        chart = _by_level(name, title, factor, cols, idx, level)
        return Chart(name, f"Spread by {factor} level", chart.spec, chart.columns, chart.rows,
                     chart.note)
    edges = np.linspace(level.min(), level.max(), MAX_LEVELS + 1)
    centre = (edges[:-1] + edges[1:]) / 2
    binned = centre[np.clip(np.searchsorted(edges, level, side="right") - 1, 0, MAX_LEVELS - 1)]
    chart = _by_level(name, title, f"{factor} (binned)", cols, idx, np.round(binned, 6))
    return Chart(name, f"Spread by {factor} level", chart.spec, chart.columns, chart.rows,
                 chart.note + f" {factor} has more than {MAX_LEVELS} levels: runs are grouped "
                 f"into {MAX_LEVELS} equal-width bins, each named by its centre.")


def histogram(results: dict, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    res = cols.values["residual"][idx]
    counts, edges = np.histogram(res, bins=30)
    bins = [{"x": float(a), "x2": float(b), "runs": int(c)}
            for a, b, c in zip(edges[:-1], edges[1:], counts, strict=True)]
    bars = alt.Chart(alt.NamedData(name="bins")).mark_rect(color=BIN_FILL).encode(
        x=alt.X("x:Q", title="Residual"), x2="x2:Q", y=alt.Y("runs:Q", title="Runs"),
        tooltip=[alt.Tooltip("runs:Q", title="Runs")])
    where, flagged = _marked(cols, idx)
    data = _mark_rows(cols, idx[where], residual=res[where])
    ticks = (alt.Chart(name="runs").mark_tick(thickness=2).encode(
        x="residual:Q", y=alt.value(HEIGHT), tooltip=[alt.Tooltip("label:N", title="Run")])
             .add_params(alt.selection_point(name="pick", fields=["row"], on="click",
                                             clear="dblclick")))
    spec = _layered([bars, ticks], data, bins, "Histogram of residuals")
    rows = [(_r(b["x"]), _r(b["x2"]), b["runs"]) for b in bins]
    return Chart("histogram", "Histogram of residuals", spec,
                 ("Residual from", "to", "Runs"), rows,
                 f"{len(idx):,} runs in 30 bins; ticks mark the "
                 f"{_marked_words(len(where), flagged)}.")


def run_order(results: dict, cols: RunColumns) -> Chart | None:
    idx = included_runs(cols)
    idx = idx[np.isfinite(cols.run_order[idx])]
    if not len(idx):
        return None
    order, stud = cols.run_order[idx], cols.values["studentized"][idx]
    sort = np.argsort(order, kind="stable")
    order, stud = order[sort], stud[sort]
    groups = np.array_split(np.arange(len(order)), min(ORDER_BINS, len(order)))
    band = []
    for g in groups:
        q = np.percentile(stud[g], [0, 25, 50, 75, 100])
        band.append({"from": float(order[g[0]]), "to": float(order[g[-1]]),
                     "at": float((order[g[0]] + order[g[-1]]) / 2), "min": float(q[0]),
                     "q1": float(q[1]), "median": float(q[2]), "q3": float(q[3]),
                     "max": float(q[4]), "runs": len(g)})
    limit = _outlier_limit(results)
    outer = alt.Chart(alt.NamedData(name="bins")).mark_area(color="#dfe6ee").encode(
        x=alt.X("at:Q", title="Run order"), y=alt.Y("min:Q", title="Studentized residual"),
        y2="max:Q")
    inner = alt.Chart(alt.NamedData(name="bins")).mark_area(color=BIN_FILL).encode(
        x="at:Q", y="q1:Q", y2="q3:Q")
    middle = alt.Chart(alt.NamedData(name="bins"), name="path").mark_line(
        color=REFERENCE).encode(x="at:Q", y="median:Q", order="at:Q")
    where, flagged = _marked(cols, idx)
    data = _mark_rows(cols, idx[where], studentized=cols.values["studentized"][idx[where]])
    pts = _points(alt.X("run_order:Q", title="Run order"),
                  alt.Y("studentized:Q", title="Studentized residual"),
                  alt.Tooltip("studentized:Q", format=".3g", title="Studentized"))
    limits = [_rules([{"at": 0}], REFERENCE, dash=(1, 0)),
              _rules([{"at": -limit}, {"at": limit}], LIMIT_REVIEW)]
    spec = _layered([outer, inner, middle, *limits, pts], data, band,
                    "Studentized residuals in run order")
    rows = [(int(b["from"]), int(b["to"]), b["runs"], _r(b["min"]), _r(b["median"]),
             _r(b["max"])) for b in band]
    return Chart("run_order", "Studentized residuals in run order", spec,
                 ("Run order from", "to", "Runs", "Lowest", "Median", "Highest"),
                 rows[:TABLE_ROWS],
                 f"{len(idx):,} runs in {len(band)} run-order bins: the light band spans the "
                 "lowest to highest studentized residual in each bin, the darker band its "
                 f"quartiles, the line its median. Dashed lines at ±{limit:g}; the "
                 f"{_marked_words(len(where), flagged)} are drawn as points.")


def cooks_distance(results: dict, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    rows_, cook = cols.row[idx], cols.values["cooks_distance"][idx]
    groups = np.array_split(np.arange(len(idx)), min(ORDER_BINS, len(idx)))
    bins = [{"x": int(rows_[g[0]]), "x2": int(rows_[g[-1]]), "max": float(np.nanmax(cook[g])),
             "runs": len(g)} for g in groups]
    limit = _check(results, "influence").get("details", {}).get("cooks_review_limit")
    bars = alt.Chart(alt.NamedData(name="bins")).mark_rect(color=BIN_FILL).encode(
        x=alt.X("x:Q", title="Row"), x2="x2:Q", y=alt.Y("max:Q", title="Cook's distance"),
        tooltip=[alt.Tooltip("x:Q", title="From row"), alt.Tooltip("x2:Q", title="To row"),
                 alt.Tooltip("max:Q", format=".3g", title="Largest Cook's distance")])
    where, flagged = _marked(cols, idx)
    data = _mark_rows(cols, idx[where], cooks_distance=cook[where])
    pts = _points(alt.X("row:Q", title="Row"), alt.Y("cooks_distance:Q", title="Cook's distance"),
                  alt.Tooltip("cooks_distance:Q", format=".3g", title="Cook's distance"))
    layers = [bars] + ([_rules([{"at": limit}], LIMIT_REVIEW)] if limit else []) + [pts]
    spec = _layered(layers, data, bins, "Cook's distance by run")
    return Chart("cooks_distance", "Cook's distance by run", spec,
                 ("Rows from", "to", "Runs", "Largest Cook's distance"),
                 [(b["x"], b["x2"], b["runs"], _r(b["max"])) for b in bins][:TABLE_ROWS],
                 f"{len(idx):,} runs in {len(bins)} bins of rows, each bar the largest Cook's "
                 f"distance in its bin; the {_marked_words(len(where), flagged)} are "
                 "drawn as points."
                 + ("" if not limit else f" Dashed line: review limit {limit:.3g} (F median)."))


def leverage(results: dict, cols: RunColumns) -> Chart:
    idx = included_runs(cols)
    rules, note = leverage_limits(results)
    return _scatter("leverage", "Leverage against studentized residual", cols, idx,
                    cols.values["leverage"][idx], cols.values["studentized"][idx],
                    ("leverage", "studentized"), ("Leverage h", "Studentized residual"), rules,
                    ("Run", "Run order", "Leverage", "Studentized residual"), note)


def binned_charts(results: dict, cols: RunColumns, factors: list[str],
                  covariates: dict[str, dict[int, Any]]) -> list[Chart | None]:
    out: list[Chart | None] = [normal_probability(results, cols), histogram(results, cols),
                               residuals_vs_fitted(results, cols), run_order(results, cols)]
    out += [residuals_vs_factor(results, f, cols) for f in factors]
    out += [spread_by_level(results, f, cols) for f in factors]
    out += [residuals_vs_covariate(results, name, values, cols)
            for name, values in covariates.items()]
    out += [cooks_distance(results, cols), leverage(results, cols)]
    return out


def binned_contour(results: dict, x: str, y: str, cols: RunColumns) -> Chart:
    """The contour with the design's distinct settings (not every run) on top."""
    keep = ~cols.excluded
    px, py = cols.actual[x][keep], cols.actual[y][keep]
    pairs, first, counts = np.unique(np.column_stack([px, py]), axis=0, return_index=True,
                                     return_counts=True)
    if len(pairs) > MARK_MAX:
        top = np.argsort(-counts, kind="stable")[:MARK_MAX]
        pairs, first, counts = pairs[top], first[top], counts[top]
    chart = contour(results, x, y, _subset(cols, np.flatnonzero(keep)[first]))
    rows = chart.spec["datasets"]["runs"]
    for d, c in zip(rows, counts.tolist(), strict=True):
        d["label"] = f"{c} run{'s' if c > 1 else ''} at this setting"
    return Chart(chart.name, chart.title, chart.spec, (x, y, "Runs"),
                 [(d["px"], d["py"], c) for d, c in zip(rows, counts.tolist(), strict=True)]
                 [:TABLE_ROWS],
                 f"Points mark the {len(pairs):,} distinct settings of {x} and {y} "
                 f"({int(keep.sum()):,} runs). " + chart.note)


def _subset(cols: RunColumns, index: np.ndarray) -> RunColumns:
    """The runs at ``index``, in that order."""
    return RunColumns(
        row=cols.row[index], run_order=cols.run_order[index], excluded=cols.excluded[index],
        values={k: v[index] for k, v in cols.values.items()},
        coded={k: v[index] for k, v in cols.coded.items()},
        actual={k: v[index] for k, v in cols.actual.items()}, factors=cols.factors,
        label=None, exclusion_reason={}, flags={})
