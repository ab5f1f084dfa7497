"""Main-effect and interaction plots of a fit, from the runs that entered it.

Main effects: one small panel per factor, the mean observed response at each of its levels (a
two-level factor, two levels and a centre, a categorical factor), or, for a factor with more
settings, the model's prediction across its range with the other factors at their centre
(categorical ones averaged over their levels). Each panel's title says which it shows.

Interactions: one panel per two-factor interaction in the model, a line for the low and the high
setting of one factor across the other (a line per level when that factor is categorical):
observed means when both factors suit them, the model's prediction otherwise.
"""

from __future__ import annotations

from typing import Any

import altair as alt
import numpy as np

from app.analysis.effect_plots import (
    held_level_means,
    level_means,
    observed_plot_suits,
    two_factor_pairs,
)
from app.analysis.runstore import RunColumns
from app.web.charts import POINT, Chart, _r, level_names, predict_grid

PANEL = 170
TRACE_POINTS = 21
LINES = ["#23527c", "#b5651d", "#4d7f50", "#7a4f9a", "#8f1d1d", "#5d6776"]
OBSERVED, PREDICTED = "observed mean", "model prediction"


def _factor_docs(results: dict) -> dict[str, dict]:
    return {f["name"]: f for f in results["model"]["factors"]}


def _centre(f: dict) -> float:
    return 0.0 if f.get("low") is None else (f["low"] + f["high"]) / 2.0


def _held_settings(factor: dict) -> list[tuple[str, Any]]:
    """The settings a trace holds a factor at: declared low and high, or every level name."""
    if factor.get("levels"):
        return [(name, name) for name in factor["levels"]]
    low, high = (-1.0, 1.0) if factor.get("low") is None else (factor["low"], factor["high"])
    return [(f"{factor['name']} low ({low:g})", low), (f"{factor['name']} high ({high:g})", high)]


def _predicted(results: dict, x: str, span: np.ndarray, held: dict[str, Any]) -> np.ndarray:
    """Prediction along ``span`` of factor ``x`` with ``held`` settings, others at centre."""
    settings: dict[str, Any] = {}
    for name, f in _factor_docs(results).items():
        settings[name] = span if name == x else held.get(name, _centre(f))
    return predict_grid(results["model"], settings)


def _x_encoding(name: str, names: list[str] | None) -> alt.X:
    if names:
        return alt.X("level:N", title=name, sort=names)
    return alt.X("level:Q", title=name, scale=alt.Scale(zero=False))


def _panel(dataset: str, title: str, x: alt.X, y_title: str, colour: bool,
           observed: bool) -> alt.Chart:
    """One panel; observed means are drawn as points joined by lines, a prediction as a line."""
    enc: dict[str, Any] = {
        "x": x, "y": alt.Y("mean:Q", title=y_title, scale=alt.Scale(zero=False)),
        "tooltip": [alt.Tooltip("level:N", title="Setting"),
                    alt.Tooltip("mean:Q", format=".4g", title="Response"),
                    alt.Tooltip("runs:Q", title="Runs")]}
    if colour:
        enc["color"] = alt.Color("held:N", title=None, scale=alt.Scale(range=LINES),
                                 legend=alt.Legend(orient="bottom", columns=1))
        enc["detail"] = "held:N"
    return (alt.Chart(alt.NamedData(name=dataset)).mark_line(point=observed, color=POINT)
            .encode(**enc).properties(width=PANEL, height=PANEL, title=title))


def _spec(panels: list[alt.Chart], datasets: dict[str, list[dict]], title: str) -> dict:
    spec = (alt.concat(*panels, columns=3).resolve_scale(y="shared", color="independent")
            .properties(title=title).to_dict(validate=False))
    spec["datasets"] = datasets
    return spec


def _points(levels, means, runs, names: list[str] | None, held: str | None = None
            ) -> list[dict]:
    out = []
    for level, mean, n in zip(np.asarray(levels).tolist(), np.asarray(means).tolist(),
                              np.asarray(runs).tolist(), strict=True):
        point = {"level": names[int(level) - 1] if names else _r(level, 6),
                 "mean": None if mean != mean else float(mean), "runs": n}
        if held is not None:
            point["held"] = held
        out.append(point)
    return out


def main_effects(results: dict, cols: RunColumns) -> Chart | None:
    fitted = ~cols.excluded
    observed = cols.values["observed"][fitted]
    response = results.get("response", "response")
    panels, datasets, rows, how = [], {}, [], []
    for i, name in enumerate(cols.factors):
        names = level_names(results, name)
        setting = cols.actual[name][fitted]
        if observed_plot_suits(setting, names is not None):
            m = level_means(setting, observed)
            data, kind = _points(m.levels, m.means, m.runs, names), OBSERVED
        else:
            span = np.linspace(np.nanmin(setting), np.nanmax(setting), TRACE_POINTS)
            z = _predicted(results, name, span, {})
            data, kind = _points(span, z, [None] * len(span), None), PREDICTED
        how.append(f"{name}: {kind}")
        datasets[f"main_{i}"] = data
        panels.append(_panel(f"main_{i}", f"{name} ({kind})", _x_encoding(name, names),
                             f"{'Mean' if kind == OBSERVED else 'Predicted'} {response}",
                             False, kind == OBSERVED))
        rows += [(name, d["level"], _r(d["mean"]), d["runs"], kind) for d in data]
    if not panels:
        return None
    spec = _spec(panels, datasets, f"Main effects on {response}")
    return Chart("main_effects", f"Main effects on {response}", spec,
                 ("Factor", "Setting", response, "Runs", "From"), rows,
                 "Observed means use the runs that entered the fit; a factor with more than "
                 "three settings shows the model's prediction across its range with the other "
                 "factors at their centre. " + "; ".join(how) + ".")


def _interaction_panel(results: dict, cols: RunColumns, x: str, trace: str
                       ) -> tuple[list[dict], str]:
    fitted = ~cols.excluded
    docs = _factor_docs(results)
    names = level_names(results, x)
    x_set, t_set = cols.actual[x][fitted], cols.actual[trace][fitted]
    observed = cols.values["observed"][fitted]
    trace_names = level_names(results, trace)
    both_observed = (observed_plot_suits(x_set, names is not None)
                     and observed_plot_suits(t_set, trace_names is not None))
    data: list[dict] = []
    if both_observed:
        held = (list(range(1, len(trace_names) + 1)) if trace_names
                else [float(np.nanmin(t_set)), float(np.nanmax(t_set))])
        for at in held:
            words = (trace_names[int(at) - 1] if trace_names
                     else f"{trace} {'low' if at == held[0] else 'high'} ({at:g})")
            m = held_level_means(x_set, t_set, at, observed)
            data += _points(m.levels, m.means, m.runs, names, words)
        return data, OBSERVED
    span = np.linspace(np.nanmin(x_set), np.nanmax(x_set), TRACE_POINTS)
    for words, at in _held_settings(docs[trace]):
        z = _predicted(results, x, span, {trace: at})
        data += _points(span, z, [None] * len(span), None, words)
    return data, PREDICTED


def interactions(results: dict, cols: RunColumns) -> Chart | None:
    response = results.get("response", "response")
    panels, datasets, rows = [], {}, []
    for i, (a, b) in enumerate(two_factor_pairs(results["model"]["terms"])):
        # a categorical factor makes the lines, a continuous one the axis, where they differ
        x, trace = (b, a) if level_names(results, a) and not level_names(results, b) else (a, b)
        data, kind = _interaction_panel(results, cols, x, trace)
        datasets[f"pair_{i}"] = data
        panels.append(_panel(f"pair_{i}", f"{x} × {trace} ({kind})",
                             _x_encoding(x, level_names(results, x)),
                             f"{'Mean' if kind == OBSERVED else 'Predicted'} {response}", True,
                             kind == OBSERVED))
        rows += [(f"{x} × {trace}", d["held"], d["level"], _r(d["mean"]), d["runs"], kind)
                 for d in data]
    if not panels:
        return None
    spec = _spec(panels, datasets, f"Interactions on {response}")
    return Chart("interactions", f"Interaction plots for {response}", spec,
                 ("Pair", "Held at", "Setting", response, "Runs", "From"), rows,
                 "One panel per two-factor interaction in the model: a line for each held "
                 "setting of the second factor. Lines that are not parallel show the "
                 "interaction. Predicted panels hold the other factors at their centre.")
