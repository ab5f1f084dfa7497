"""The factors of a plan: checked once, and the one mapping between coded and natural units.

A factor is ``{"name", "low", "high", "units"?}`` in natural units. Coding is the project's own
(x = (value - centre) / half-range, :mod:`app.analysis.coding`), so a plan's settings read back
to exactly the coded design the analysis will see.
"""

from __future__ import annotations

import math

import numpy as np

from ..coding import decode
from ..spec import Factor
from ..terms import factor_name_problem


class PlanError(ValueError):
    """A plan that cannot be built or evaluated as asked; ``field`` names the input at fault
    (``"factors[2].low"``, ``"runs"``, ``"axial"``)."""

    def __init__(self, message: str, field: str) -> None:
        super().__init__(message)
        self.message = message
        self.field = field

    def to_dict(self) -> dict:
        return {"field": self.field, "message": self.message}


def _number(value, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise PlanError("give a finite number", field)
    return float(value)


def checked_factors(factors: list[dict], *, at_least: int, at_most: int) -> list[dict]:
    """The factors as plain dicts with float levels, or a PlanError naming the first fault."""
    if not isinstance(factors, (list, tuple)):
        raise PlanError("give the factors as a list", "factors")
    if not at_least <= len(factors) <= at_most:
        raise PlanError(f"this design takes {at_least} to {at_most} factors, not {len(factors)}",
                        "factors")
    out, seen = [], set()
    for i, factor in enumerate(factors):
        where = f"factors[{i}]"
        if not isinstance(factor, dict):
            raise PlanError("each factor is an object with name, low and high", where)
        name = factor.get("name")
        if not isinstance(name, str) or not name.strip():
            raise PlanError("every factor needs a name", f"{where}.name")
        problem = factor_name_problem(name)
        if problem:
            raise PlanError(problem, f"{where}.name")
        if name in seen:
            raise PlanError(f"the name '{name}' is used twice", f"{where}.name")
        seen.add(name)
        low = _number(factor.get("low"), f"{where}.low")
        high = _number(factor.get("high"), f"{where}.high")
        if not low < high:
            raise PlanError(f"low ({low:g}) must be below high ({high:g})", f"{where}.low")
        units = factor.get("units")
        if units is not None and not isinstance(units, str):
            raise PlanError("units are text", f"{where}.units")
        out.append({"name": name, "low": low, "high": high, "units": units})
    return out


MAX_LEVELS = 10
MAX_COMBINATIONS = 64


def split_categorical(factors: list[dict]) -> tuple[list[dict], list[dict]]:
    """(continuous factors, categorical ones) from the request's factor list. A categorical
    factor is ``{"name", "levels": [names]}`` (supplier, machine): the design of the
    continuous factors is crossed with its levels. Refuses, naming the field, levels that are
    not two or more distinct names, or a name used twice."""
    if not isinstance(factors, (list, tuple)):
        raise PlanError("give the factors as a list", "factors")
    continuous, crossed = [], []
    for i, factor in enumerate(factors):
        if not isinstance(factor, dict) or "levels" not in factor:
            continuous.append(factor)
            continue
        where = f"factors[{i}]"
        name = factor.get("name")
        if not isinstance(name, str) or not name.strip():
            raise PlanError("every factor needs a name", f"{where}.name")
        others = [f.get("name") for j, f in enumerate(factors) if j != i and isinstance(f, dict)]
        if name in others:
            raise PlanError(f"the name '{name}' is used twice", f"{where}.name")
        levels = factor["levels"]
        if (not isinstance(levels, list) or not 2 <= len(levels) <= MAX_LEVELS
                or not all(isinstance(v, str) and v.strip() for v in levels)
                or len(set(levels)) != len(levels)):
            raise PlanError(f"a categorical factor needs 2 to {MAX_LEVELS} distinct level names",
                            f"{where}.levels")
        if {"low", "high"} & set(factor):
            raise PlanError("a categorical factor has levels, not low and high", f"{where}.low")
        crossed.append({"name": name, "levels": list(levels), "units": None})
    combinations = int(np.prod([len(f["levels"]) for f in crossed])) if crossed else 1
    if combinations > MAX_COMBINATIONS:
        raise PlanError(f"{combinations} level combinations is more than {MAX_COMBINATIONS}",
                        "factors")
    return continuous, crossed


def natural_settings(coded: np.ndarray, factors: list[dict]) -> np.ndarray:
    """Coded rows in natural units, through the analysis's own decoding."""
    spec = tuple(Factor(f["name"], f["low"], f["high"]) for f in factors)
    return decode(coded, spec)
