"""Setpoints from fitted models: desirability, design region, search, canonical analysis and
design space. Pure computation on stored result documents (numpy, scipy, pandas only).

``propose`` combines one fit per response with Derringer–Suich desirability; ``single_goal``
is the one-response search the command line runs. Both return JSON-able dicts.
"""

from __future__ import annotations

import numpy as np

from .. import transforms
from ..predict import predict
from .canonical import RIDGE_RATIO, SetpointError, Surface, canonical_analysis, classify
from .design_space import design_space
from .desirability import Goal, composite, parse_goal
from .region import OutsideRegion, Region, build_region, load_fits, observed_range
from .search import DESIRABILITY_TOL, search

CAUTION = ("The model holds only inside the tested region. Confirmation runs are required before "
           "production use. Local procedures, regulations and qualified personnel have the final "
           "say.")

__all__ = ["CAUTION", "RIDGE_RATIO", "Goal", "OutsideRegion", "Region", "SetpointError",
           "Surface", "canonical_analysis", "classify", "design_space", "parse_goal", "propose",
           "single_goal"]


def _setup(results_by_response, bounds, fixed):
    if isinstance(results_by_response, dict):
        # a FitResult object is accepted in place of its document
        results_by_response = {r: doc.to_dict() if hasattr(doc, "to_dict") else doc
                               for r, doc in results_by_response.items()}
    fits = load_fits(results_by_response)
    region = build_region(fits.factors, fits.kind, fits.radius, bounds=bounds, fixed=fixed,
                          why=fits.why)
    surfaces = {r: Surface.from_result(doc, r) for r, doc in fits.results.items()}
    return fits, region, surfaces


def _point(region: Region, coded: np.ndarray) -> tuple[dict, dict]:
    coded_d = {f.name: float(coded[i]) for i, f in enumerate(region.factors)}
    settings = {f.name: float(f.to_actual(coded[i])) for i, f in enumerate(region.factors)}
    return coded_d, settings


def _gradients(region: Region, surface: Surface, coded: np.ndarray) -> tuple[dict, dict]:
    g = surface.gradient(coded)
    per_coded = {f.name: _num(g[i]) for i, f in enumerate(region.factors)}
    per_actual = {f.name: _num(g[i] / f.half_range) for i, f in enumerate(region.factors)}
    return per_coded, per_actual


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None


def _stationary(region: Region, surface: Surface, result: dict) -> dict | None:
    ca = canonical_analysis(surface)
    if ca is None:
        return None
    coded, settings = _point(region, ca.coded)
    active = [n for n in region.names if n not in ca.inactive]
    return {"coded": coded, "settings": settings, "kind": ca.kind,
            "eigenvalues": [float(v) for v in ca.eigenvalues],
            "eigenvectors": [{n: float(ca.eigenvectors[j, c]) for j, n in enumerate(active)}
                             for c in range(len(active))],
            "predicted": predict(result, settings)["predicted"],
            "predicted_model_scale": ca.predicted_model_scale,
            "inside_region": bool(region.in_design_region(ca.coded)[0]),
            "unique": ca.unique, "inactive_factors": list(ca.inactive),
            "ridge_rule": f"ridge when the smallest |eigenvalue| is at most {RIDGE_RATIO:g} of "
                          "the largest"}


def _region_doc(fits, region: Region) -> dict:
    doc = region.to_dict()
    doc["note"] = fits.note
    return doc


def _check_doc(found, objective_name: str, region: Region) -> dict:
    return {f"best_{objective_name}": found["grid"], f"local_{objective_name}": found["local"],
            "agrees": found["result"].agrees, "method": found["result"].grid_method,
            "points": found["result"].grid_points, "starts": found["result"].starts,
            "source": found["result"].source,
            "grid_point": _point(region, found["result"].grid_coded)[0]}


def propose(results_by_response: dict[str, dict], goals: dict[str, dict], bounds=None,
            fixed=None, seed: int = 0) -> dict:
    """Settings that maximise the composite desirability of one or more fitted responses.

    ``results_by_response`` maps a response name to its fit's result document
    (``FitResult.to_dict()``); ``goals`` maps a response to ``{goal, target, low, high, weight,
    importance}``; ``bounds`` {factor: [low, high]} and ``fixed`` {factor: value} are in actual
    units. Responses without a goal are predicted but do not enter D. Predictions with 95 % CI
    and PI at the optimum come from :func:`app.analysis.predict`. Verified in
    tests/analysis/optimize/test_search.py and test_refusals.py.
    """
    fits, region, surfaces = _setup(results_by_response, bounds, fixed)
    if not isinstance(goals, dict) or not goals:
        raise SetpointError("At least one response needs a goal", field="goals")
    unknown = [r for r in goals if r not in surfaces]
    if unknown:
        raise SetpointError(f"Goal names response '{unknown[0]}', which has no fit here "
                            f"(fits: {', '.join(surfaces)})", field="goals")
    parsed = {r: parse_goal(r, spec, observed_range(fits.results[r])) for r, spec in goals.items()}

    def individual(coded: np.ndarray) -> dict[str, np.ndarray]:
        return {r: g.desirability(surfaces[r].response_scale(coded)) for r, g in parsed.items()}

    def objective(coded: np.ndarray) -> np.ndarray:
        return -composite(individual(coded), parsed)

    found = search(region, objective, seed=seed, tolerance=DESIRABILITY_TOL)
    best = found.coded
    coded, settings = _point(region, best)
    preds = {r: predict(doc, settings) for r, doc in fits.results.items()}
    d_each = {r: float(g.desirability(preds[r]["predicted"]
                                      if preds[r]["predicted"] is not None else np.nan))
              for r, g in parsed.items()}
    big_d = float(composite({r: np.array(v) for r, v in d_each.items()}, parsed))
    grads = {r: _gradients(region, s, best) for r, s in surfaces.items()}
    optimum = {"coded": coded, "settings": settings,
               "predicted": {r: p["predicted"] for r, p in preds.items()},
               "ci": {r: p["ci"] for r, p in preds.items()},
               "pi": {r: p["pi"] for r, p in preds.items()},
               "desirability": big_d, "individual_desirability": d_each,
               "gradient": {r: g[0] for r, g in grads.items()},
               "gradient_actual": {r: g[1] for r, g in grads.items()}}
    checks = {"grid": -found.grid_objective, "local": _num(-found.local_objective), "result": found}
    return {"optimum": optimum, "grid_check": _check_doc(checks, "desirability", region),
            "stationary_point": {r: _stationary(region, s, fits.results[r])
                                 for r, s in surfaces.items()},
            "region": _region_doc(fits, region),
            "goals": {r: g.to_dict() for r, g in parsed.items()},
            "note": None if big_d > 0 else ("No setting in the region gives every response a "
                                            "desirability above zero; relax the goals"),
            "caution": CAUTION}


def _parse_cli_goal(goal: str) -> tuple[str, float | None]:
    text = str(goal).strip().lower()
    if text in ("maximize", "minimize"):
        return text, None
    if text.startswith("target="):
        try:
            value = float(text.split("=", 1)[1])
        except ValueError as err:
            raise SetpointError(f"Goal '{goal}': target=VALUE needs a number",
                                field="goal") from err
        if np.isfinite(value):
            return "target", value
    raise SetpointError(f"Goal '{goal}' is not one of maximize, minimize, target=VALUE",
                        field="goal")


def single_goal(results: dict, goal: str, bounds=None, fixed=None, seed: int = 0) -> dict:
    """One response, goal ``maximize``, ``minimize`` or ``target=VALUE`` (the command line's).

    Optimises the prediction itself (the model-scale value, or its distance to the
    transformed target) rather than a desirability, which would be flat beyond the observed
    range; the desirability reported uses the observed range of the response as limits, and
    is None (with a note) when there are no observed values or a target lies outside that
    range. Shapes: ``optimum {coded,
    settings, predicted, ci [lo, hi], pi [lo, hi], desirability}`` and ``stationary_point
    {coded, kind, eigenvalues, predicted}`` (None for a model that is not quadratic).
    """
    if hasattr(results, "to_dict"):
        results = results.to_dict()
    response = results.get("response") if isinstance(results, dict) else None
    response = response or "response"
    fits, region, surfaces = _setup({response: results}, bounds, fixed)
    surface = surfaces[response]
    name, target = _parse_cli_goal(goal)
    decreasing = transforms.is_decreasing(surface.transform, surface.lam)
    if name == "target":
        with np.errstate(all="ignore"):
            z_target = float(transforms.forward(np.array([target]), surface.transform,
                                                surface.lam)[0])
        if not np.isfinite(z_target):
            raise SetpointError(f"Target {target:g} is outside the range the "
                                f"'{surface.transform}' transform of '{response}' can take",
                                field="target")

        def objective(coded):
            return (surface.model_scale(coded) - z_target) ** 2
    else:
        sign = (1.0 if name == "minimize" else -1.0) * (-1.0 if decreasing else 1.0)

        def objective(coded):
            return sign * surface.model_scale(coded)

    found = search(region, objective, seed=seed)
    coded, settings = _point(region, found.coded)
    pred = predict(results, settings)
    spec = {"goal": name} if target is None else {"goal": name, "target": target}
    note = None
    try:
        parsed = parse_goal(response, spec, observed_range(results))
        d = float(parsed.desirability(np.nan if pred["predicted"] is None else pred["predicted"]))
        goal_doc = parsed.to_dict()
    except SetpointError as err:
        # the search needs no limits; only the desirability does, so report it as missing
        d, goal_doc, note = None, spec, f"No desirability: {err}"
    grad_coded, grad_actual = _gradients(region, surface, found.coded)
    optimum = {"coded": coded, "settings": settings, "predicted": pred["predicted"],
               "ci": pred["ci"], "pi": pred["pi"], "desirability": d,
               "gradient": grad_coded, "gradient_actual": grad_actual}
    def at(point):
        return None if point is None else _num(surface.response_scale(point)[0])

    checks = {"grid": at(found.grid_coded), "local": at(found.local_coded), "result": found}
    return {"response": response, "goal": goal_doc, "optimum": optimum,
            "grid_check": _check_doc(checks, "predicted", region),
            "stationary_point": _stationary(region, surface, results),
            "region": _region_doc(fits, region), "note": note, "caution": CAUTION}
