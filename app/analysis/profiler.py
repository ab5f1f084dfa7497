"""Predictions at chosen settings and the profiler's traces, from a stored result document.

``predict_many`` answers "what does the model say at these settings" (e.g. the rounded
setpoints a plant will run): the predicted value with its confidence interval for the mean and
its prediction interval for one new run, back-transformed where the fit used a transform, and
whether each point lies in the design region the runs covered (outside it the model is an
extrapolation). ``profile`` gives, through one chosen point, one trace per factor: the
prediction and its confidence band as that factor moves across its tested span while the others
stay where they are. Both go through :func:`app.analysis.prediction.predict`, which is checked
against statsmodels' ``get_prediction``; the tests check these against it point by point.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .optimize.region import Region, build_region, load_fits
from .prediction import predict
from .spec import AnalysisError

# Points per profiler trace: smooth enough for a quadratic, small enough to answer at once.
TRACE_POINTS = 41
MAX_SETTINGS = 1000  # predictions per request

_TRANSFORM_WORDS = {
    "none": None,
    "log": "natural log",
    "sqrt": "square root",
    "inverse": "reciprocal (1/y)",
    "boxcox": "Box–Cox",
}


class PredictionError(AnalysisError):
    """Settings that cannot be predicted at; ``field`` names the item and factor."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


def scale_note(result: dict) -> str | None:
    """How predicted values relate to the fitted scale, in words (None without a transform)."""
    model = result["model"]
    transform = model.get("transform", "none")
    words = _TRANSFORM_WORDS.get(transform, transform)
    if words is None:
        return None
    lam = model.get("lambda")
    if transform == "boxcox" and lam is not None:
        words += f" with λ = {lam:.4g}"
    return (f"The model was fitted to the {words} of the response. Values and interval ends are "
            f"transformed back to the response's own units, so the value is the median, not the "
            f"mean, of the response at those settings and the intervals are not symmetric.")


CATEGORICAL_REGION = ("With categorical factors the design region is the cube of the "
                      "continuous factors' low and high levels, at every level.")


def _categorical(factors: list[dict]) -> list[dict]:
    return [f for f in factors if f.get("levels") is not None]


def _region(result: dict) -> Region:
    """The design region of the continuous factors (the setpoint search's rule); with
    categorical factors in the model, their cube at every level."""
    factors = result["model"]["factors"]
    if _categorical(factors):
        continuous = [f for f in factors if f.get("levels") is None]
        return build_region(continuous, "cube", None, why=CATEGORICAL_REGION)
    fits = load_fits({result.get("response") or "response": result})
    return build_region(fits.factors, fits.kind, fits.radius, why=fits.why)


def _settings(raw: Any, factors: list[dict], where: str) -> dict[str, float | str]:
    if not isinstance(raw, dict):
        raise PredictionError(f"{where} must be an object of factor name to value.", field=where)
    names = [f["name"] for f in factors]
    unknown = [k for k in raw if k not in names]
    if unknown:
        raise PredictionError(f"{where}: '{unknown[0]}' is not a factor of this fit (factors: "
                              f"{', '.join(names)}).", field=f"{where}.{unknown[0]}")
    out: dict[str, float | str] = {}
    for name in names:
        if name not in raw:
            raise PredictionError(f"{where} needs a value for the factor '{name}'.",
                                  field=f"{where}.{name}")
        value = raw[name]
        levels = next(f.get("levels") for f in factors if f["name"] == name)
        if levels is not None:
            if str(value) not in levels:
                raise PredictionError(f"{where}: the value for '{name}' must be one of its "
                                      f"levels ({', '.join(levels)}), not {value!r}.",
                                      field=f"{where}.{name}")
            out[name] = str(value)
            continue
        try:
            number = float(value) if not isinstance(value, bool) else math.nan
        except (TypeError, ValueError):
            number = math.nan
        if not math.isfinite(number):
            raise PredictionError(f"{where}: the value for '{name}' must be a finite number "
                                  f"(got {value!r}).", field=f"{where}.{name}")
        out[name] = number
    return out


def _point(result: dict, region: Region, settings: dict[str, float | str],
           level: float) -> dict:
    p = predict(result, settings, level=level)
    coded = np.array([p["coded"][n] for n in region.names])
    return {"settings": settings, "predicted": p["predicted"], "ci": p["ci"], "pi": p["pi"],
            "inside_design_region": bool(region.tested(coded)[0]),
            "coded": {n: float(v) for n, v in zip(region.names, coded, strict=True)}}


def _level(level: Any) -> float:
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0.5 <= level < 1:
        raise PredictionError(f"level must be a number from 0.5 to below 1 (got {level!r}).",
                              field="level")
    return float(level)


def predict_many(result: dict, settings: list, level: float = 0.95) -> dict:
    """Predictions at each item of ``settings`` (natural units, a value for every factor)."""
    level = _level(level)
    if not isinstance(settings, list) or not settings:
        raise PredictionError("settings must be a non-empty list of objects of factor name to "
                              "value.", field="settings")
    if len(settings) > MAX_SETTINGS:
        raise PredictionError(f"At most {MAX_SETTINGS:,} settings per request (got "
                              f"{len(settings):,}).", field="settings")
    factors = result["model"]["factors"]
    region = _region(result)
    points = [_point(result, region, _settings(raw, factors, f"settings[{i}]"), level)
              for i, raw in enumerate(settings)]
    return {"response": result.get("response"), "level": level, "scale": scale_note(result),
            "region": {"shape": region.kind, "radius": region.radius, "why": region.why},
            "predictions": points}


def span(region: Region) -> list[tuple[float, float]]:
    """Each factor's coded span for the profiler: the cube's edges, or the axial points when the
    design region is the sphere through them."""
    reach = max(1.0, region.radius or 1.0) if region.kind == "sphere" else 1.0
    return [(-reach, reach)] * len(region.factors)


def profile(result: dict, settings: dict | None = None, level: float = 0.95,
            points: int = TRACE_POINTS) -> dict:
    """One trace per factor through ``settings`` (the design centre when None)."""
    level = _level(level)
    factors = result["model"]["factors"]
    region = _region(result)
    if settings is None:  # the design centre, at each categorical factor's first level
        settings = {**{f["name"]: f["levels"][0] for f in _categorical(factors)},
                    **{f.name: float(f.to_actual(0.0)) for f in region.factors}}
    at = _settings(settings, factors, "settings")
    centre = _point(result, region, at, level)
    traces = []
    for f, (lo, hi) in zip(region.factors, span(region), strict=True):
        values = [float(f.to_actual(c)) for c in np.linspace(lo, hi, points)]
        # The chosen value itself lies on the trace, so the trace passes through the point.
        values = sorted({*values, at[f.name]})
        rows = []
        for v in values:
            p = _point(result, region, {**at, f.name: v}, level)
            rows.append({"value": v, "predicted": p["predicted"], "ci": p["ci"],
                         "inside_design_region": p["inside_design_region"]})
        traces.append({"factor": f.name, "units": f.units,
                       "low": float(f.to_actual(lo)), "high": float(f.to_actual(hi)),
                       "at": at[f.name], "points": rows})
    # A categorical factor has no line to trace: the prediction at each of its levels.
    levels = [{"factor": f["name"], "at": at[f["name"]], "points": [
        {"value": name, **{k: p[k] for k in ("predicted", "ci", "inside_design_region")}}
        for name in f["levels"]
        for p in [_point(result, region, {**at, f["name"]: name}, level)]]}
        for f in _categorical(factors)]
    return {"response": result.get("response"), "level": level, "scale": scale_note(result),
            "region": {"shape": region.kind, "radius": region.radius, "why": region.why},
            "point": centre, "traces": traces, "levels": levels}
