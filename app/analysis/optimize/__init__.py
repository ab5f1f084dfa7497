"""Setpoints from fitted models: desirability, design region, search, canonical analysis and
design space. Pure computation on stored result documents (numpy, scipy, pandas only).

``propose`` combines one fit per response with Derringer–Suich desirability; ``single_goal``
is the one-response search the command line runs. Both return JSON-able dicts.
"""

from __future__ import annotations

import numpy as np

from .. import transforms
from ..prediction import predict
from . import levels
from .canonical import RIDGE_RATIO, SetpointError, Surface, canonical_analysis, classify
from .check import MET, desirability_check, goal_met_set, optimise_response
from .design_space import design_space
from .desirability import DESIRABILITY_GOALS, Goal, overall, parse_goal, refuse_old_words
from .region import OutsideRegion, Region, build_region, load_fits, observed_range
from .search import DESIRABILITY_TOL, search

CAUTION = ("The model holds only inside the tested region. Confirmation runs are required before "
           "production use. Local procedures, regulations and qualified personnel have the final "
           "say.")
# Two combinations of levels whose best overall desirabilities D differ by less than this share
# of the larger are reported as equally good: far below the three decimals shown, far above
# the search's last digits.
TIE_D = 1e-6

__all__ = ["CAUTION", "RIDGE_RATIO", "Goal", "OutsideRegion", "Region", "SetpointError",
           "Surface", "canonical_analysis", "classify", "design_space", "parse_goal", "propose",
           "refuse_old_words", "single_goal"]


def _documents(results_by_response) -> dict[str, dict]:
    if isinstance(results_by_response, dict):
        # a FitResult object is accepted in place of its document
        return {r: doc.to_dict() if hasattr(doc, "to_dict") else doc
                for r, doc in results_by_response.items()}
    return results_by_response


def _setup(results_by_response, bounds, fixed, *, at_levels: bool = False):
    """The fits, the region and the surfaces of one search; ``at_levels`` for models reduced
    to their continuous factors, whose region the reason then says it is about."""
    fits = load_fits(results_by_response)
    why = (f"Over the continuous factors, at each level searched: {fits.why[0].lower()}"
           f"{fits.why[1:]}" if at_levels and fits.why else fits.why)
    region = build_region(fits.factors, fits.kind, fits.radius, bounds=bounds, fixed=fixed,
                          why=why)
    surfaces = {r: Surface.from_result(doc, r) for r, doc in fits.results.items()}
    return fits, region, surfaces


def _options(results: dict[str, dict], bounds, fixed) -> list[tuple[dict | None, tuple]]:
    """What to search: ``[(None, setup)]`` without categorical factors, else one
    ``(levels, setup)`` per combination of levels still open, each on the models reduced to
    the continuous factors at those levels (:mod:`.levels`)."""
    first = next(iter(results.values()), None) if isinstance(results, dict) else None
    categorical = levels.categorical_factors(first) if isinstance(first, dict) else []
    if not categorical:
        return [(None, _setup(results, bounds, fixed))]
    for response, doc in results.items():
        if [f["name"] for f in levels.categorical_factors(doc)] != [f["name"] for f in
                                                                   categorical]:
            raise SetpointError(f"Fits must share the same factors: '{response}' has other "
                                "categorical factors than the first fit", field="factors")
    levels.refuse_categorical_bounds(bounds, categorical)
    continuous_fixed, chosen = levels.split_fixed(fixed, categorical)
    return [(combo, _setup({r: levels.at_levels(doc, combo) for r, doc in results.items()},
                           bounds, continuous_fixed or None, at_levels=True))
            for combo in levels.combinations(categorical, chosen)]


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


def _check_doc(found, objective_name: str, region: Region, agrees: bool | None = None) -> dict:
    """The earlier ``grid_check`` shape, kept for current pages; ``check`` has the full story."""
    return {f"best_{objective_name}": found["grid"], f"local_{objective_name}": found["local"],
            "agrees": found["result"].agrees if agrees is None else agrees,
            "method": found["result"].grid_method,
            "points": found["result"].grid_points, "starts": found["result"].starts,
            "source": found["result"].source,
            "grid_point": _point(region, found["result"].grid_coded)[0]}


def _grid_check_of(check: dict, objective_name: str) -> dict:
    """The ``grid_check`` shape filled from a ``check`` document."""
    dense, local = check["methods"]["dense"], check["methods"]["local"]
    return {f"best_{objective_name}": dense["value"], f"local_{objective_name}": local["value"],
            "agrees": check["status"] == "agrees", "method": dense["method"],
            "points": dense["points"], "starts": local["starts"],
            "source": check["proposal"]["from"], "grid_point": dense["coded"]}


def _single_response_goal(goals: dict) -> tuple[str, str] | None:
    """(response, maximize|minimize) when the proposal has one goal, it is one of those, and no
    response is kept within limits."""
    if len(goals) != 1:
        return None
    response, spec = next(iter(goals.items()))
    name = str(spec.get("goal", "")).strip().lower() if isinstance(spec, dict) else ""
    # parse_goal has validated spec by now
    return (response, name) if name in ("maximize", "minimize") else None


def _achievable(region: Region, surface: Surface, seed: int) -> tuple[float, float]:
    """Least and greatest prediction of one response inside the region."""
    least = optimise_response(region, surface, "minimize", seed=seed).value
    greatest = optimise_response(region, surface, "maximize", seed=seed).value
    return least, greatest


def propose(results_by_response: dict[str, dict], goals: dict[str, dict], bounds=None,
            fixed=None, seed: int = 0) -> dict:
    """Setpoints from one or more fitted responses.

    One response with goal maximize or minimize (and no limits to keep within): the predicted
    response itself is optimised inside the region (:func:`optimise_response`), checked against
    a dense search and the canonical analysis. Otherwise (targets, several responses, limits to
    keep within) the Derringer–Suich overall desirability D is maximised; a maximize/minimize
    limit left out is set so that d reaches 1 only at the best prediction in the region
    (:func:`parse_goal`), and when D = 1 over a set of settings ``goal_met_set`` describes that
    set. A response with goal ``within`` is a constraint: settings whose prediction lies outside
    its lower/upper are not allowed (D = 0 there), and it has no weight in D. The result's
    ``constraints`` says for each whether the proposal meets it.

    ``results_by_response`` maps a response name to its fit's result document
    (``FitResult.to_dict()``); ``goals`` maps a response to ``{goal, lower, upper, target,
    shape, weight}``; ``bounds`` {factor: [low, high]} and ``fixed`` {factor: value} are in
    natural units. Responses without a goal are predicted but do not enter D. Predictions with
    95 % CI and PI at the optimum come from :func:`app.analysis.predict`. Verified in
    tests/analysis/optimize/test_search.py, test_true_optimum.py, test_refusals.py and
    test_within.py.
    """
    results = _documents(results_by_response)
    options = _options(results, bounds, fixed)
    surfaces = options[0][1][2]
    if not isinstance(goals, dict) or not goals:
        raise SetpointError("At least one response needs a goal", field="goals")
    unknown = [r for r in goals if r not in surfaces]
    if unknown:
        raise SetpointError(f"Goal names response '{unknown[0]}', which has no fit here "
                            f"(fits: {', '.join(surfaces)})", field="goals")
    for r, spec in goals.items():
        refuse_old_words(r, spec)
    # one set of limits for every combination of levels, so their D values compare
    achievable = {r: _widest([_achievable(setup[1], setup[2][r], seed)
                              for _, setup in options])
                  for r, spec in goals.items() if isinstance(spec, dict)
                  and str(spec.get("goal", "")).strip().lower() in ("maximize", "minimize")}
    every = {r: parse_goal(r, spec, observed_range(results[r]), achievable.get(r))
             for r, spec in goals.items()}
    if not any(not g.is_constraint for g in every.values()):
        raise SetpointError("Keeping responses within limits needs at least one response to "
                            f"{', '.join(DESIRABILITY_GOALS)}", field="goals")
    found = [(combo, _propose_in(*setup, goals, every, seed)) for combo, setup in options]
    if found[0][0] is None:
        return found[0][1]
    single = _single_response_goal(goals)
    what = (f"the {'highest' if single[1] == 'maximize' else 'lowest'} predicted {single[0]}"
            if single else "the highest overall desirability D")
    doc = _best_levels(found, results, [_score(d, single) for _, d in found], what,
                       unitless=single is None)
    _full_predictions(doc, results)
    return doc


def _widest(ranges: list[tuple[float, float]]) -> tuple[float, float]:
    return min(lo for lo, _ in ranges), max(hi for _, hi in ranges)


def _propose_in(fits, region: Region, surfaces: dict, goals: dict, every: dict,
                seed: int) -> dict:
    """The search of :func:`propose` in one region, goals already parsed."""
    parsed = {r: g for r, g in every.items() if not g.is_constraint}
    kept = {r: g for r, g in every.items() if g.is_constraint}

    def individual(coded: np.ndarray) -> dict[str, np.ndarray]:
        return {r: g.desirability(surfaces[r].response_scale(coded)) for r, g in parsed.items()}

    def big_d_at(coded: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            value = overall(individual(coded), parsed)
        return np.where(feasible(coded), value, 0.0) if kept else value

    def margins(coded: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return np.hstack([g.margins(surfaces[r].response_scale(coded))
                              for r, g in kept.items()])

    def feasible(coded: np.ndarray) -> np.ndarray:
        coded = np.atleast_2d(coded)
        with np.errstate(all="ignore"):
            return np.all([g.met(surfaces[r].response_scale(coded)) for r, g in kept.items()],
                          axis=0)

    def smooth(coded: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return -overall(individual(coded), parsed)

    limits = {"constraints": margins, "feasible": feasible} if kept else {}
    single = _single_response_goal(goals)
    if single is not None:
        response, sense = single
        best_response = optimise_response(region, surfaces[response], sense, seed=seed)
        best, check = best_response.coded, best_response.check
        # the dense search of D shows whether limits the engineer set are met over a set
        found = search(region, smooth, seed=seed, tolerance=DESIRABILITY_TOL)
    else:
        found = search(region, smooth, seed=seed, tolerance=DESIRABILITY_TOL, **limits)
        if found.coded is None or not np.isfinite(found.objective):
            raise SetpointError("No setting in the region keeps "
                                f"{', '.join(kept)} within the limits given; relax them",
                                field="goals")
        check = desirability_check(region, found, lambda c: big_d_at(np.atleast_2d(c))[0])
        best = found.coded
    met_set = goal_met_set(region, found, -found.dense_values)
    if single is None and met_set is not None:
        # no unique optimum: of the settings meeting every goal, the one nearest the centre
        best = region.as_array({n: region.factors[i].to_coded(v)
                                for i, (n, v) in enumerate(met_set["nearest_centre"].items())})
        check["proposal"]["from"] = "goal met over a set: its point nearest the design centre"
    if single is None and all(g.goal == "target" for g in parsed.values()):
        # every target met along a curve or surface (whose points the dense search meets only
        # by chance): of those settings, the nearest the centre
        nearer = _nearest_meeting_targets(region, best, surfaces, parsed, kept,
                                          lambda c: big_d_at(np.atleast_2d(c))[0])
        if nearer is not None:
            best = nearer
            check["proposal"]["from"] = ("every target met along a set of settings: its point "
                                         "nearest the design centre")
    coded, settings = _point(region, best)
    preds = {r: predict(doc, settings) for r, doc in fits.results.items()}

    def predicted(r: str) -> float:
        return preds[r]["predicted"] if preds[r]["predicted"] is not None else np.nan

    d_each = {r: float(g.desirability(predicted(r))) for r, g in parsed.items()}
    big_d = float(overall({r: np.array(v) for r, v in d_each.items()}, parsed))
    constraints = {r: {"lower": g.lower, "upper": g.upper, "predicted": preds[r]["predicted"],
                       "met": bool(g.met(predicted(r))[0])} for r, g in kept.items()}
    if not all(c["met"] for c in constraints.values()):
        big_d = 0.0
    grads = {r: _gradients(region, s, best) for r, s in surfaces.items()}
    optimum = {"coded": coded, "settings": settings,
               "predicted": {r: p["predicted"] for r, p in preds.items()},
               "ci": {r: p["ci"] for r, p in preds.items()},
               "pi": {r: p["pi"] for r, p in preds.items()},
               "desirability": big_d, "individual_desirability": d_each,
               "gradient": {r: g[0] for r, g in grads.items()},
               "gradient_actual": {r: g[1] for r, g in grads.items()}}
    if single is not None:
        response = single[0]
        grid_check = {**_grid_check_of(check, "predicted"), "response": response}
    else:
        checks = {"grid": -found.grid_objective, "local": _num(-found.local_objective),
                  "result": found}
        grid_check = _check_doc(checks, "desirability", region,
                                agrees=check["status"] == "agrees")
    return {"optimum": optimum, "grid_check": grid_check, "check": check,
            "goal_met_set": met_set,
            "stationary_point": {r: _stationary(region, s, fits.results[r])
                                 for r, s in surfaces.items()},
            "region": _region_doc(fits, region),
            # every goal a target or a range, and fully met: nothing better lies beyond
            "edge": (None if big_d >= MET and all(g.goal not in ("maximize", "minimize")
                                                  for g in parsed.values())
                     else region.edge(best)),
            "goals": {r: g.to_dict() for r, g in every.items()},
            "constraints": constraints,
            "note": None if big_d > 0 else ("No setting in the region gives every response a "
                                            "desirability above zero while keeping the limits; "
                                            "relax the goals"),
            "caution": CAUTION}


def _nearest_meeting_targets(region: Region, start: np.ndarray, surfaces: dict, targets: dict,
                             kept: dict, d_at) -> np.ndarray | None:
    """The point nearest the design centre where every target response is predicted at its
    target (and every limit kept), when ``start`` meets them all (D = 1 to a millionth):
    targets are met along a curve or surface, and the search's point on it is arbitrary. None
    when ``start`` does not meet them or no nearer point is found; the point returned is
    checked to be inside the region and to meet them at least as well."""
    start = np.asarray(start, dtype=float)
    free = region.free
    at_start = d_at(start)
    if not free or at_start < 1.0 - TIE_D:  # the search's last digits aside, D = 1
        return None
    from scipy.optimize import minimize

    def full(z: np.ndarray) -> np.ndarray:
        x = start.copy()
        x[free] = z
        return x

    constraints = [{"type": "eq", "fun": lambda z, r=r, t=g.target: float(
        surfaces[r].response_scale(full(z)[None, :])[0]) - t} for r, g in targets.items()]
    for r, g in kept.items():
        constraints.append({"type": "ineq", "fun": lambda z, r=r, g=g: g.margins(
            surfaces[r].response_scale(full(z)[None, :])).ravel()})
    if region.kind == "sphere":
        constraints.append({"type": "ineq",
                            "fun": lambda z: region.radius**2 - float(np.sum(full(z) ** 2))})
    bounds = [(region.lower[i], region.upper[i]) for i in free]
    with np.errstate(all="ignore"):
        found = minimize(lambda z: float(np.sum(full(z) ** 2)), start[free], method="SLSQP",
                         bounds=bounds, constraints=constraints,
                         options={"maxiter": 200, "ftol": 1e-12})
    x = full(np.asarray(found.x, dtype=float))
    if (not np.all(np.isfinite(x)) or not region.inside(x) or d_at(x) < min(MET, at_start)
            or float(np.sum(x**2)) >= float(np.sum(start**2)) - 1e-9):
        return None
    return x


def _score(doc: dict, single: tuple[str, str] | None) -> float:
    """How good one combination's proposal is: the predicted response for a single maximize
    or minimize goal (negated for minimize), else the overall desirability D."""
    optimum = doc["optimum"]
    if single is None:
        return float(optimum["desirability"])
    return _signed(optimum["predicted"][single[0]], single[1])


def _signed(value: float | None, sense: str) -> float:
    if value is None or not np.isfinite(value):
        return -np.inf
    return float(value) if sense == "maximize" else -float(value)


def _best_levels(found: list[tuple[dict, dict]], results: dict[str, dict],
                 scores: list[float], what: str, unitless: bool = False) -> dict:
    """The proposal of the best-scoring combination of levels (the first of equals, in the
    levels' own order) with its settings naming the levels, every combination's best listed
    under ``levels.by_level``, the levels the engineer fixed under ``levels.held`` and the
    choice said in ``levels.statement``. ``unitless`` scores are overall desirabilities D,
    equal within the share ``TIE_D`` of the best; other scores (predicted values) within 1e-9
    relative. A score that is not finite never wins over a finite one."""
    # a combination without a finite score (no prediction) is never proposed over one with
    scores = [sc if np.isfinite(sc) else -np.inf for sc in scores]
    top = max(scores)
    if not np.isfinite(top):
        tol = 0.0
    elif unitless:  # D lies in [0, 1]: what the search cannot tell apart is a tie
        tol = TIE_D * top  # relative: D = 0 never ties with a D above it
    else:
        tol = 1e-9 * max(1.0, abs(top))
    best = next(i for i, sc in enumerate(scores) if sc >= top - tol)
    chosen_levels, doc = found[best]
    first = next(iter(results.values()))
    order = [f["name"] for f in first["model"]["factors"]]
    by_level = [{"levels": combo, "chosen": i == best,
                 "settings": levels.with_levels(d["optimum"]["settings"], combo, order),
                 "predicted": _per_response(d["optimum"]["predicted"], results),
                 "desirability": d["optimum"]["desirability"]}
                for i, (combo, d) in enumerate(found)]
    ties = ([i for i, sc in enumerate(scores) if i != best and sc >= top - tol]
            if np.isfinite(top) else [])
    # a factor at one level in every combination was fixed there by the engineer
    held = {n: v for n, v in chosen_levels.items() if all(c[n] == v for c, _ in found)}
    varied = [n for n in chosen_levels if n not in held]
    held_text = ", ".join(f"{n} held at {v}" for n, v in held.items())
    if varied:
        named = ", ".join(f"{n} = {chosen_levels[n]}" for n in varied)
        statement = (f"Searched the continuous factors at each of {len(found)} "
                     f"{_plural(len(found), 'combination')} of the levels of "
                     f"{', '.join(varied)}" + (f" ({held_text}, as asked)" if held else "")
                     + f"; {named} gives {what}.")
    else:
        statement = (f"{held_text[0].upper()}{held_text[1:]}, as asked: no other level was "
                     "searched.")
    if ties:
        statement += (f" {len(ties)} other {_plural(len(ties), 'combination')} "
                      f"{'does' if len(ties) == 1 else 'do'} equally well"
                      + (" (D within a millionth)" if unitless else "")
                      + "; the first in the levels' order is shown.")
    optimum = doc["optimum"]
    optimum["settings"] = levels.with_levels(optimum["settings"], chosen_levels, order)
    optimum["coded"] = levels.with_levels(optimum["coded"], chosen_levels, order)
    stationary = doc["stationary_point"]
    # propose keeps one per response, single_goal one (or None)
    several = isinstance(stationary, dict) and "kind" not in stationary
    for sp in (stationary.values() if several else [stationary]):
        if sp:
            sp["settings"] = levels.with_levels(sp["settings"], chosen_levels, order)
            sp["coded"] = levels.with_levels(sp["coded"], chosen_levels, order)
    doc["levels"] = {"chosen": chosen_levels, "statement": statement, "by_level": by_level,
                     "factors": [f["name"] for f in levels.categorical_factors(first)],
                     "held": held}
    return doc


def _plural(count: int, word: str) -> str:
    return word if count == 1 else word + "s"


def _per_response(predicted, results: dict[str, dict]) -> dict:
    """``{response: value}``: single_goal's optimum holds the one response's value alone."""
    return predicted if isinstance(predicted, dict) else {next(iter(results)): predicted}


def _full_predictions(doc: dict, results: dict[str, dict]) -> None:
    """The reported predictions at the chosen levels, from the full fitted models (the
    reduced ones give the same numbers; tests/analysis/optimize/test_levels.py)."""
    optimum = doc["optimum"]
    for response, result in results.items():
        full = predict(result, optimum["settings"])
        for key in ("predicted", "ci", "pi"):
            if isinstance(optimum[key], dict):
                optimum[key][response] = full[key]
            else:
                optimum[key] = full[key]


def _parse_cli_goal(goal: str) -> tuple[str, float | None]:
    text = str(goal).strip().lower()
    if text in ("maximize", "minimize"):
        return text, None
    if text.replace("-", "_").replace(" ", "_").split("=")[0] in ("in_range", "within"):
        raise SetpointError(f"Goal '{goal}': 'in_range' is no longer accepted; keeping a "
                            "response within limits (goal 'within') is a constraint beside a "
                            "goal, made in a proposal (web form or API), not a goal of its own",
                            field="goal")
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
    name, target = _parse_cli_goal(goal)
    observed = observed_range(results)
    found = [(combo, _single_in(*setup, response, name, target, observed, seed))
             for combo, setup in _options({response: results}, bounds, fixed)]
    if found[0][0] is None:
        return found[0][1]
    if name == "target":
        scores = [_signed(None if d["optimum"]["predicted"] is None
                          else abs(d["optimum"]["predicted"] - target), "minimize")
                  for _, d in found]
        what = f"the prediction nearest the target {target:g}"
    else:
        scores = [_signed(d["optimum"]["predicted"], name) for _, d in found]
        what = f"the {'highest' if name == 'maximize' else 'lowest'} predicted {response}"
    doc = _best_levels(found, {response: results}, scores, what)
    _full_predictions(doc, {response: results})
    return doc


def _single_in(fits, region: Region, surfaces: dict, response: str, name: str,
               target: float | None, observed: tuple[float, float] | None, seed: int) -> dict:
    """The search of :func:`single_goal` in one region."""
    surface = surfaces[response]
    results = fits.results[response]
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

        found = search(region, objective, seed=seed)
        best = found.coded
        check = None
    else:
        best_response = optimise_response(region, surface, name, seed=seed)
        best, check = best_response.coded, best_response.check
    coded, settings = _point(region, best)
    pred = predict(results, settings)
    spec = {"goal": name} if target is None else {"goal": name, "target": target}
    note = None
    try:
        parsed = parse_goal(response, spec, observed)
        d = float(parsed.desirability(np.nan if pred["predicted"] is None else pred["predicted"]))
        goal_doc = parsed.to_dict()
    except SetpointError as err:
        # the search needs no limits; only the desirability does, so report it as missing
        d, goal_doc, note = None, spec, f"No desirability: {err}"
    grad_coded, grad_actual = _gradients(region, surface, best)
    # a target the model reaches (to a millionth of its residual SD) has nothing beyond it
    reached = (name == "target" and pred["predicted"] is not None
               and abs(pred["predicted"] - target) <= 1e-6 * float(results["model"]["s"] or 0))
    edge = None if reached else region.edge(best)
    optimum = {"coded": coded, "settings": settings, "predicted": pred["predicted"],
               "ci": pred["ci"], "pi": pred["pi"], "desirability": d,
               "gradient": grad_coded, "gradient_actual": grad_actual}
    if check is None:
        def at(point):
            return None if point is None else _num(surface.response_scale(point)[0])

        checks = {"grid": at(found.grid_coded), "local": at(found.local_coded), "result": found}
        grid_check = _check_doc(checks, "predicted", region)
    else:
        grid_check = _grid_check_of(check, "predicted")
    return {"response": response, "goal": goal_doc, "optimum": optimum,
            "grid_check": grid_check, "check": check,
            "stationary_point": _stationary(region, surface, results),
            "region": _region_doc(fits, region), "edge": edge, "note": note,
            "caution": CAUTION}
