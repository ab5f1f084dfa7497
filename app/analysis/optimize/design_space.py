"""Design-space map: where every response's prediction interval stays inside its limits.

For two chosen factors, with the others fixed, a grid over the design region is marked
``inside`` where, for every response given specification limits, the 95 % prediction interval
lies within [lower, upper] (either limit optional). That set is a design space in the sense of
ICH Q8(R2): settings shown to give acceptable quality, here with the uncertainty of a single
future run allowed for.
"""

from __future__ import annotations

import numpy as np

from . import levels
from .canonical import SetpointError, Surface
from .region import build_region, load_fits


def _limit(value, response: str, field: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool):
        raise SetpointError(f"Limits for '{response}': {field} must be a number", field=field)
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise SetpointError(f"Limits for '{response}': {field} must be a number (got {value!r})",
                            field=field) from err
    if not np.isfinite(v):
        raise SetpointError(f"Limits for '{response}': {field} must be finite", field=field)
    return v


def parse_specs(specs: dict, responses: list[str]) -> dict[str, tuple[float | None, float | None]]:
    """Validate ``{response: {lower, upper}}``; each names a fitted response and a limit."""
    if not isinstance(specs, dict) or not specs:
        raise SetpointError("Give specification limits for at least one response", field="specs")
    out = {}
    for response, spec in specs.items():
        if response not in responses:
            raise SetpointError(f"Limits name response '{response}', which has no fit here "
                                f"(fits: {', '.join(responses)})", field="specs")
        if not isinstance(spec, dict):
            raise SetpointError(f"Limits for '{response}' must be {{lower, upper}}", field="specs")
        unknown = sorted(set(spec) - {"lower", "upper"})
        if unknown:
            raise SetpointError(f"Limits for '{response}': unknown field '{unknown[0]}' (use "
                                "lower, upper)", field=unknown[0])
        lower = _limit(spec.get("lower"), response, "lower")
        upper = _limit(spec.get("upper"), response, "upper")
        if lower is None and upper is None:
            raise SetpointError(f"Limits for '{response}' need lower, upper or both",
                                field="lower")
        if lower is not None and upper is not None and not lower < upper:
            raise SetpointError(f"Limits for '{response}': lower must be less than upper",
                                field="lower")
        out[response] = (lower, upper)
    return out


def _at_levels(results: dict[str, dict], fixed: dict | None, x_factor: str,
               y_factor: str) -> tuple[dict[str, dict], dict | None, dict[str, str]]:
    """With categorical factors: the models reduced to the continuous factors at the levels
    ``fixed`` names (each categorical factor needs one), the continuous fixed values, and the
    levels held."""
    first = next(iter(results.values()), None) if isinstance(results, dict) else None
    categorical = levels.categorical_factors(first) if isinstance(first, dict) else []
    if not categorical:
        return results, fixed, {}
    for label, name in (("x_factor", x_factor), ("y_factor", y_factor)):
        if name in {f["name"] for f in categorical}:
            raise SetpointError(f"'{name}' is categorical: the map is drawn over two continuous "
                                "factors with each categorical factor at one level",
                                field=label)
    continuous, held = levels.split_fixed(fixed, categorical)
    missing = [f["name"] for f in categorical if f["name"] not in held]
    if missing:
        raise SetpointError(f"The map holds each categorical factor at one level: give the "
                            f"level of '{missing[0]}'", field=missing[0])
    return ({r: levels.at_levels(doc, held) for r, doc in results.items()}, continuous or None,
            held)


def design_space(results_by_response: dict[str, dict], specs: dict, x_factor: str,
                 y_factor: str, fixed: dict | None = None, points: int = 41,
                 level: float = 0.95) -> dict:
    """The design-space map over ``x_factor`` × ``y_factor``.

    Factors not named in ``fixed`` (actual units) sit at their centre. Returns ``points`` (tidy
    records ``{x, y, coded {factor}, inside, pi {response: [lo, hi]}, predicted {response}}``,
    one per grid point inside the design region, x and y in actual units),
    ``fraction_inside``, the region, the fixed values and the included design points for
    overlay. Interval arithmetic matches :func:`app.analysis.predict` (checked in
    tests/analysis/optimize/test_design_space.py).
    """
    results_by_response, fixed, held = _at_levels(results_by_response, fixed, x_factor,
                                                  y_factor)
    fits = load_fits(results_by_response)
    names = [f["name"] for f in fits.factors]
    for label, name in (("x_factor", x_factor), ("y_factor", y_factor)):
        if name not in names:
            raise SetpointError(f"{label} '{name}' is not a factor of the fits "
                                f"({', '.join(names)})", field=label)
    if x_factor == y_factor:
        raise SetpointError("x_factor and y_factor must be two different factors",
                            field="y_factor")
    for name in fixed or {}:
        if name in (x_factor, y_factor):
            raise SetpointError(f"'{name}' is mapped, so it cannot also be fixed", field=name)
    if isinstance(points, bool) or not isinstance(points, int) or not 3 <= points <= 201:
        raise SetpointError("points must be a whole number from 3 to 201", field="points")
    limits = parse_specs(specs, list(fits.results))
    region = build_region(fits.factors, fits.kind, fits.radius, fixed=fixed)
    ix, iy = names.index(x_factor), names.index(y_factor)
    full_fixed = {names[i]: region.factors[i].to_actual(region.fixed.get(i, 0.0))
                  for i in range(len(names)) if i not in (ix, iy)}
    region = build_region(fits.factors, fits.kind, fits.radius, fixed=full_fixed)
    edge = 1.0 if region.kind == "cube" else region.radius
    axis = np.linspace(-edge, edge, points)
    gx, gy = np.meshgrid(axis, axis, indexing="ij")
    coded = np.zeros((gx.size, len(names)))
    for i, v in region.fixed.items():
        coded[:, i] = v
    coded[:, ix], coded[:, iy] = gx.ravel(), gy.ravel()
    coded = coded[region.in_design_region(coded)]
    inside = np.ones(len(coded), dtype=bool)
    per_response = {}
    for response, (lower, upper) in limits.items():
        iv = Surface.from_result(fits.results[response], response).intervals(coded, level)
        lo, hi = iv["pi_low"], iv["pi_high"]
        ok = np.isfinite(lo) & np.isfinite(hi)
        if lower is not None:
            ok &= lo >= lower
        if upper is not None:
            ok &= hi <= upper
        inside &= ok
        per_response[response] = iv
    fx, fy = region.factors[ix], region.factors[iy]
    records = []
    for n in range(len(coded)):
        records.append({
            "x": fx.to_actual(coded[n, ix]), "y": fy.to_actual(coded[n, iy]),
            "coded": {x_factor: float(coded[n, ix]), y_factor: float(coded[n, iy])},
            "inside": bool(inside[n]),
            "pi": {r: [_finite(iv["pi_low"][n]), _finite(iv["pi_high"][n])]
                   for r, iv in per_response.items()},
            "predicted": {r: _finite(iv["predicted"][n]) for r, iv in per_response.items()}})
    first = next(iter(fits.results.values()))
    design_points = [{"row": r.get("row"), "x": r["actual"][x_factor], "y": r["actual"][y_factor]}
                     for r in first.get("runs") or [] if not r.get("excluded")]
    return {"x_factor": x_factor, "y_factor": y_factor, "fixed": {**full_fixed, **held},
            "specs": {r: {"lower": lo, "upper": hi} for r, (lo, hi) in limits.items()},
            "level": level, "points": records,
            "fraction_inside": float(inside.mean()) if len(inside) else 0.0,
            "region": region.to_dict(), "region_note": fits.note,
            "design_points": design_points}


def _finite(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None
