"""Categorical factors in the setpoint search: one continuous model per combination of levels.

With every categorical factor held at one level, each model term is a polynomial in the
continuous factors times a constant (the product of that level's sum-to-zero codes), so the
fitted model reduces exactly to a polynomial in the continuous factors alone. If ``X`` is the
full model row and ``x`` the reduced one, ``X = x T`` for a fixed matrix ``T``; the reduced
coefficients are ``T b`` and their (X'X)^-1 block ``T V T'``, so predictions and their
intervals at that level are unchanged (checked against :func:`app.analysis.predict` on the
full model in tests/analysis/optimize/test_levels.py). The search of the continuous region
then runs once per combination and the best combination is chosen by the caller.
"""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np

from ..prediction import model_rows
from .canonical import SetpointError

# More combinations than this would make one search per combination slow and the table of
# per-level results unreadable; fixing some levels brings the count down.
MAX_COMBINATIONS = 64


def categorical_factors(result: dict) -> list[dict]:
    """The categorical factors of a result document's model, in model order."""
    return [f for f in (result.get("model") or {}).get("factors") or []
            if f.get("levels") is not None]


def split_fixed(fixed: dict | None, categorical: list[dict]) -> tuple[dict, dict[str, str]]:
    """(continuous fixed values, chosen levels) from one ``fixed`` mapping; a level that is
    not one of the factor's levels is refused naming the factor."""
    fixed = dict(fixed or {})
    chosen: dict[str, str] = {}
    for factor in categorical:
        name = factor["name"]
        if name not in fixed or fixed[name] is None or fixed[name] == "":
            fixed.pop(name, None)
            continue
        value = str(fixed.pop(name))
        if value not in factor["levels"]:
            raise SetpointError(f"Fixed level for '{name}' must be one of "
                                f"{', '.join(factor['levels'])}, not '{value}'", field=name)
        chosen[name] = value
    return fixed, chosen


def refuse_categorical_bounds(bounds: dict | None, categorical: list[dict]) -> None:
    for factor in categorical:
        if bounds and factor["name"] in bounds:
            raise SetpointError(f"'{factor['name']}' is categorical: it has levels, not a range; "
                                "fix one of its levels instead of giving bounds",
                                field=factor["name"])


def combinations(categorical: list[dict], chosen: dict[str, str]) -> list[dict[str, str]]:
    """Every combination of levels still open (a fixed factor keeps its one level), in the
    levels' own order."""
    choices = [[chosen[f["name"]]] if f["name"] in chosen else list(f["levels"])
               for f in categorical]
    count = int(np.prod([len(c) for c in choices])) if choices else 1
    if count > MAX_COMBINATIONS:
        raise SetpointError(f"The categorical factors give {count} combinations of levels, more "
                            f"than the {MAX_COMBINATIONS} searched at once; fix the level of "
                            "some of them", field=categorical[0]["name"])
    return [dict(zip([f["name"] for f in categorical], combo, strict=True))
            for combo in itertools.product(*choices)]


def _continuous_part(term: dict, continuous: set[str]) -> tuple[tuple[str, int], ...]:
    return tuple((n, int(p)) for n, p in term["powers"] if n in continuous)


def _term_name(powers: tuple[tuple[str, int], ...]) -> str:
    return ":".join(n if p == 1 else f"{n}^{p}" for n, p in powers)


def _reduced_model(model: dict, levels: dict[str, str]) -> dict:
    factors = model["factors"]
    continuous = [f for f in factors if f.get("levels") is None]
    names = {f["name"] for f in continuous}
    reduced_terms: list[tuple[tuple[str, int], ...]] = []
    for term in model["terms"]:
        part = _continuous_part(term, names)
        if part and part not in reduced_terms:
            reduced_terms.append(part)
    reduced = {"factors": [dict(f) for f in continuous],
               "terms": [{"name": _term_name(t), "powers": [list(p) for p in t]}
                         for t in reduced_terms],
               "block_columns": [], "s": model.get("s"), "df_resid": model["df_resid"],
               "transform": model.get("transform", "none"), "lambda": model.get("lambda")}
    # T from rows at random continuous settings: every full column is a reduced column times
    # a constant, so the least-squares solution is exact (checked below)
    rng = np.random.default_rng(0)
    n = 4 * (len(reduced_terms) + 1) + 8
    values = {f["name"]: rng.uniform(-1.0, 1.0, n) for f in continuous}
    full_values = {**values, **{f["name"]: np.full(n, float(f["levels"].index(levels[f["name"]])
                                                           + 1))
                                for f in factors if f.get("levels") is not None}}
    x_full = model_rows(model, full_values)
    x_red = model_rows(reduced, values)
    t, *_ = np.linalg.lstsq(x_red, x_full, rcond=None)
    if not np.allclose(x_red @ t, x_full, rtol=0.0, atol=1e-9):
        raise SetpointError("The model does not reduce to the continuous factors at fixed "
                            "levels", field="terms")
    t = np.round(t, 12)
    b = np.asarray(model["coefficients"], dtype=float)
    v = np.asarray(model["xtx_inv"], dtype=float)
    reduced["coefficients"] = (t @ b).tolist()
    reduced["xtx_inv"] = (t @ v @ t.T).tolist()
    reduced["columns"] = ["Intercept", *[term["name"] for term in reduced["terms"]]]
    return reduced


def at_levels(result: dict, levels: dict[str, str]) -> dict:
    """The result document reduced to its continuous factors with each categorical factor at
    ``levels[name]``: a ``model`` the setpoint search can use, the runs made at those levels
    (their continuous settings; for the design region) and the response name."""
    model = result["model"]
    categorical = [f for f in model["factors"] if f.get("levels") is not None]
    if not [f for f in model["factors"] if f.get("levels") is None]:
        raise SetpointError("Setpoint search needs at least one continuous factor; with "
                            "categorical factors only, compare the predictions at each level",
                            field="factors")
    codes = {f["name"]: float(f["levels"].index(levels[f["name"]]) + 1) for f in categorical}
    runs = []
    for run in result.get("runs") or []:
        coded, actual = run.get("coded") or {}, run.get("actual") or {}
        if all(coded.get(n) == c for n, c in codes.items()):
            runs.append({**run,
                         "coded": {k: v for k, v in coded.items() if k not in codes},
                         "actual": {k: v for k, v in actual.items() if k not in codes}})
    return {"response": result.get("response"), "model": _reduced_model(model, levels),
            "design": None, "runs": runs}


def with_levels(values: dict[str, Any], levels: dict[str, str], order: list[str]) -> dict:
    """``values`` (continuous factors) with the level names added, in the model's factor
    order."""
    merged = {**values, **levels}
    return {n: merged[n] for n in order if n in merged}
