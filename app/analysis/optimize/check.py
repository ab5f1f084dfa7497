"""The optimum of one predicted response, and the check that it is one.

For one response with goal maximize or minimize the search optimises the prediction itself, not a
desirability (which is flat wherever the prediction passes its fully desirable limit). Every
back-transform the fits use (log, square root, reciprocal, Box–Cox) is monotone, so the search
runs on the model scale, with the direction reversed for a decreasing back-transform; values are
reported on the natural scale. Points where the back-transform is undefined are never chosen.

Three methods are compared: the multistart local search, the independent dense search over the
region (both from :func:`search`), and the canonical analysis: when the stationary point is the
kind of point the goal asks for (a maximum for maximize) and lies inside the region, it is the
optimum, and the proposal is that point. The check reports each method's best value, the gap
between the proposal and the best independent value, and the gradient at the proposal with the
components that point out of the region removed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import transforms
from .canonical import Surface, canonical_analysis
from .region import TOL, Region
from .search import DESIRABILITY_TOL, SearchResult, search

# "agrees" when no independent method beat the proposal by more than this fraction of the
# predicted response's spread over the region. Our rule: 0.1 % of the range is far below what a
# confirmation run can resolve, and far above the optimisers' convergence.
GAP_RELATIVE_TOL = 1e-3

# D counts as 1 from here: D of values that are each exactly 1 may round below 1.
MET = 1.0 - 1e-9


@dataclass(frozen=True)
class ResponseOptimum:
    """Where one response is best inside the region, how it was found, and the check."""

    coded: np.ndarray
    value: float          # natural scale
    source: str
    check: dict


def _sense_sign(sense: str) -> float:
    return 1.0 if sense == "maximize" else -1.0


def projected_gradient(region: Region, coded: np.ndarray, gradient: np.ndarray,
                       sense: str) -> tuple[np.ndarray, list[str]]:
    """The improving direction (gradient for maximize, its negative for minimize) with what
    points out of the region removed: fixed factors, a bound the point sits on, and on the
    sphere the outward radial part. Zero at a constrained optimum (the KKT conditions).
    Returns the vector and the constraints found active."""
    x = np.asarray(coded, dtype=float)
    d = _sense_sign(sense) * np.asarray(gradient, dtype=float)
    active = []
    for i in region.fixed:
        d[i] = 0.0
    for _ in range(2):   # the sphere step can turn a bound back on; twice settles it
        for i in region.free:
            f = region.factors[i].name
            if x[i] >= region.upper[i] - 1e-6 and d[i] > 0:
                d[i] = 0.0
                active.append(f"{f} at its upper limit")
            elif x[i] <= region.lower[i] + 1e-6 and d[i] < 0:
                d[i] = 0.0
                active.append(f"{f} at its lower limit")
        if region.kind == "sphere":
            r2 = float(x @ x)
            free = np.zeros_like(x)
            free[region.free] = x[region.free]
            if r2 >= region.radius**2 - 1e-6 and d @ free > 0 and free @ free > 0:
                d = d - (d @ free) / (free @ free) * free
                active.append("on the sphere")
    return d, sorted(set(active))


def _canonical(region: Region, surface: Surface, sense: str) -> tuple[np.ndarray | None, str]:
    ca = canonical_analysis(surface)
    if ca is None:
        return None, "the model is not quadratic"
    wanted = "maximum" if sense == "maximize" else "minimum"
    if ca.kind != wanted:
        return None, (f"the stationary point is a {ca.kind}, not a {wanted}, so the optimum "
                      "lies on the region's boundary")
    if not region.inside(ca.coded):
        return None, (f"the stationary point is a {wanted} outside the region (or off the bounds "
                      "and fixed values), so the optimum lies on the boundary")
    return ca.coded, f"the stationary point is a {wanted} inside the region, so it is the optimum"


def optimise_response(region: Region, surface: Surface, sense: str,
                      seed: int = 0) -> ResponseOptimum:
    """Maximise or minimise one predicted response over ``region`` and check the answer.

    Verified in tests/analysis/optimize/test_true_optimum.py against scipy.optimize on a plain
    statsmodels fit, a brute-force grid, and the stationary point.
    """
    decreasing = transforms.is_decreasing(surface.transform, surface.lam)
    sign = -_sense_sign(sense) * (-1.0 if decreasing else 1.0)

    def objective(coded: np.ndarray) -> np.ndarray:
        z = surface.model_scale(coded)
        with np.errstate(all="ignore"):
            ok = np.isfinite(surface.response_scale(coded))
        return np.where(ok, sign * z, np.inf)

    found = search(region, objective, seed=seed)
    s = _sense_sign(sense)

    def natural(point) -> float | None:
        if point is None:
            return None
        with np.errstate(all="ignore"):
            v = float(surface.response_scale(np.asarray(point)[None, :])[0])
        return v if np.isfinite(v) else None

    canon_coded, canon_why = _canonical(region, surface, sense)
    candidates = [(found.coded, "local search" if found.source == "local"
                   else "dense search, polished")]
    if canon_coded is not None:
        # a definite quadratic's stationary point inside the region is its optimum there
        candidates = [(canon_coded, "canonical analysis")]
    coded, source = candidates[0]
    value = natural(coded)
    with np.errstate(all="ignore"):
        dense_y = surface.response_scale(found.dense_coded)
    dense_y = dense_y[np.isfinite(dense_y)]
    spread = float(dense_y.max() - dense_y.min()) if dense_y.size else 0.0
    methods = {
        "local": {"value": natural(found.local_coded), "coded": _named(region, found.local_coded),
                  "starts": found.starts},
        "dense": {"value": natural(found.grid_coded), "coded": _named(region, found.grid_coded),
                  "points": found.grid_points, "method": found.grid_method},
        "canonical": {"value": natural(canon_coded), "coded": _named(region, canon_coded),
                      "applies": canon_coded is not None, "why": canon_why},
    }
    independent = [m["value"] for k, m in methods.items()
                   if k != "local" and m["value"] is not None]
    local_value = methods["local"]["value"]
    check = _gap_doc(value, independent, local_value, s, spread, GAP_RELATIVE_TOL * spread,
                     "response units")
    grad = surface.gradient(coded)
    direction, active = projected_gradient(region, coded, grad, sense)
    norm = float(np.sqrt(direction @ direction))
    check.update({
        "objective": f"predicted {surface.response} ({sense})",
        "objective_scale": ("model scale: the back-transform is monotone, so the optimum is the "
                            "same on the natural scale" if surface.transform != "none"
                            else "natural scale"),
        "methods": methods, "proposal": {"value": value, "from": source},
        "spread": spread,
        "gradient_norm": _finite(norm),
        "gradient_norm_relative": _finite(norm / spread) if spread > 0 else None,
        "active_constraints": active})
    check["statement"] = _statement(check, "the prediction")
    return ResponseOptimum(coded=np.asarray(coded, dtype=float), value=value, source=source,
                           check=check)


def desirability_check(region: Region, found: SearchResult, d_at) -> dict:
    """The check document for a desirability search (local and dense; no canonical analysis).
    ``d_at`` maps a full coded point to D."""
    methods = {"local": {"value": _finite(d_at(found.local_coded)) if found.local_coded
                         is not None else None, "coded": _named(region, found.local_coded),
                         "starts": found.starts},
               "dense": {"value": _finite(d_at(found.grid_coded)),
                         "coded": _named(region, found.grid_coded),
                         "points": found.grid_points, "method": found.grid_method},
               "canonical": {"value": None, "coded": None, "applies": False,
                             "why": "the canonical analysis describes one response, not D"}}
    value = _finite(d_at(found.coded))
    independent = [methods["dense"]["value"]] if methods["dense"]["value"] is not None else []
    check = _gap_doc(value, independent, methods["local"]["value"], 1.0, 1.0, DESIRABILITY_TOL,
                     "desirability")
    check.update({"objective": "overall desirability D", "objective_scale": "natural scale",
                  "methods": methods,
                  "proposal": {"value": value, "from": "local search" if found.source == "local"
                               else "dense search, polished"},
                  "spread": 1.0, "gradient_norm": None, "gradient_norm_relative": None,
                  "active_constraints": []})
    check["statement"] = _statement(check, "D")
    return check


def _gap_doc(value, independent, local_value, s, spread, tolerance, units) -> dict:
    best = max(independent, key=lambda v: s * v) if independent else None
    gap = None if best is None or value is None else max(0.0, s * (best - value))
    short = (None if local_value is None or value is None
             else max(0.0, s * (value - local_value)))
    if gap is None or value is None:
        status = "unchecked"
    elif gap > tolerance:
        status = "gap"
    elif short is not None and short > tolerance:
        status = "local_search_short"
    else:
        status = "agrees"
    return {"status": status,
            "gap": {"value": gap, "relative": (gap / spread if gap is not None and spread > 0
                                               else None),
                    "tolerance": tolerance,
                    "relative_tolerance": tolerance / spread if spread > 0 else None,
                    "units": units, "best_independent": best,
                    "local_short_by": short}}


def _statement(check: dict, what: str) -> str:
    gap = check["gap"]
    rel = gap["relative_tolerance"]
    tol_text = (f"{100 * rel:.2g} % of its range over the region" if rel is not None
                else f"{gap['tolerance']:.3g}")
    if check["status"] == "agrees":
        return (f"The local search, the dense search and (where it applies) the canonical "
                f"analysis agree: none found {what} better than the proposal by more than "
                f"{tol_text}.")
    if check["status"] == "local_search_short":
        return (f"The local search stopped {gap['local_short_by']:.4g} short of the best value; "
                f"the settings come from the {check['proposal']['from']}.")
    if check["status"] == "gap":
        return (f"An independent search found {what} better than the proposal by "
                f"{gap['value']:.4g} (more than {tol_text}); do not use these settings.")
    return f"The search could not be checked: {what} is undefined at the proposal."


def _named(region: Region, coded) -> dict | None:
    if coded is None:
        return None
    return {f.name: float(v) for f, v in zip(region.factors, np.asarray(coded), strict=True)}


def _finite(v) -> float | None:
    if v is None:
        return None
    v = float(np.asarray(v).ravel()[0]) if np.ndim(v) else float(v)
    return v if np.isfinite(v) else None


def goal_met_set(region: Region, found: SearchResult, d_values: np.ndarray,
                 examples: int = 5) -> dict | None:
    """Where D = 1 among the dense points, when more than one point of the dense search meets
    every goal fully: the share of points, their bounding box in natural units, and a few
    representative settings spread over the set (farthest-point order, from the one nearest the
    design centre). None when D = 1 nowhere or at a single point."""
    met = np.asarray(d_values) >= MET
    if met.sum() < 2:
        return None
    pts = found.dense_coded[met]
    box = {f.name: [f.to_actual(float(pts[:, i].min())), f.to_actual(float(pts[:, i].max()))]
           for i, f in enumerate(region.factors)}
    order = [int(np.argmin(np.sum(pts**2, axis=1)))]
    dist = np.sqrt(np.sum((pts - pts[order[0]]) ** 2, axis=1))
    while len(order) < min(examples, len(pts)):
        nxt = int(np.argmax(dist))
        if dist[nxt] <= TOL:
            break
        order.append(nxt)
        dist = np.minimum(dist, np.sqrt(np.sum((pts - pts[nxt]) ** 2, axis=1)))
    chosen = [{f.name: f.to_actual(float(pts[j, i])) for i, f in enumerate(region.factors)}
              for j in order]
    share = float(met.mean())
    return {"fraction": share, "points": int(met.sum()), "of": int(met.size),
            "box": box, "examples": chosen, "nearest_centre": chosen[0],
            "statement": (f"Every goal is fully met (D = 1) over a set of settings, "
                          f"{100 * share:.3g} % of the dense search's points in the region, "
                          "not at one point: the settings shown are one choice from that set.")}
