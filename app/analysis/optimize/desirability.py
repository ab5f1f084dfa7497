"""Derringer–Suich desirabilities, their weighted geometric mean D, and limits to keep within.

Each goal maps a predicted response y to d in [0, 1], with acceptable lower value L and upper
value U and shape exponent s (Derringer & Suich's r, s, t):

* maximize: d = 0 for y <= L, ((y - L)/(U - L))^s between, 1 for y >= U;
* minimize: d = 1 for y <= L, ((U - y)/(U - L))^s between, 0 for y >= U;
* target T with L < T < U: ((y - L)/(T - L))^s on [L, T], ((U - y)/(U - T))^t on [T, U],
  0 outside (``shape`` one number, or [s, t] = [below, above]).

The overall desirability D = (prod d_i^w_i)^(1 / sum w_i) with relative weight w_i (default 1).

A response may instead be kept within limits (goal ``within``, with ``lower`` and/or ``upper``):
that is a constraint on the search, not a desirability. Settings whose prediction lies outside
are not allowed; the response takes no part in D or its weights.

References: Derringer & Suich, J. Quality Technology 12 (1980) 214-219 (d and the shapes);
Derringer, Quality Progress 27(6) (1994) 51-58 (the weighted geometric mean). Verified against
values worked by hand in tests/analysis/optimize/test_desirability.py.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .canonical import SetpointError

GOALS = ("maximize", "minimize", "target", "within")
DESIRABILITY_GOALS = ("maximize", "minimize", "target")
FIELDS = ("goal", "lower", "upper", "target", "shape", "weight")
# Words an earlier version accepted. 'weight' then meant the shape exponent, so a request using
# them is ambiguous and is refused with the new name rather than guessed at.
RENAMED_FIELDS = {"low": "lower", "high": "upper", "importance": "weight"}
RENAMED_GOALS = {"in_range": "within", "in range": "within"}
RENAMED_HELP = {
    "low": "'lower' (the acceptable lower value)",
    "high": "'upper' (the acceptable upper value)",
    "importance": "'weight' (the relative weight in D; the shape exponent is now 'shape')",
    "in_range": "goal 'within' (keep the response within lower/upper: a constraint, not a "
                "desirability)",
}
# A limit to keep within counts as met up to this share of its scale (the optimiser stops a
# hair either side of an active constraint).
WITHIN_TOL = 1e-7


def refuse_old_words(response: str, spec) -> None:
    """Raise SetpointError naming the field when ``spec`` uses a word this version renamed."""
    if not isinstance(spec, dict):
        return
    for old in RENAMED_FIELDS:
        if old in spec:
            raise SetpointError(f"Goal for '{response}': '{old}' is no longer accepted; use "
                                f"{RENAMED_HELP[old]}", field=old)
    goal = spec.get("goal")
    if isinstance(goal, str) and goal.strip().lower() in RENAMED_GOALS:
        raise SetpointError(f"Goal for '{response}': goal '{goal}' is no longer accepted; use "
                            f"{RENAMED_HELP['in_range']}", field="goal")


@dataclass(frozen=True)
class Goal:
    """One response's goal with its resolved limits; ``limits_from`` says where L/U came from."""

    response: str
    goal: str
    lower: float | None
    upper: float | None
    target: float | None = None
    shape_below: float = 1.0
    shape_above: float = 1.0
    weight: float = 1.0
    limits_from: str = "request"

    @property
    def is_constraint(self) -> bool:
        """True for a limit to keep within: no desirability, no weight in D."""
        return self.goal == "within"

    def desirability(self, y: np.ndarray | float) -> np.ndarray:
        """d for each predicted value; a value with no prediction (NaN) gets 0."""
        if self.is_constraint:
            raise ValueError(f"'{self.response}' is kept within limits; it has no desirability")
        y = np.asarray(y, dtype=float)
        ok = np.isfinite(y)
        yy = np.where(ok, y, 0.0)
        lo, hi = self.lower, self.upper
        if self.goal == "maximize":
            d = np.clip((yy - lo) / (hi - lo), 0.0, 1.0) ** self.shape_below
        elif self.goal == "minimize":
            d = np.clip((hi - yy) / (hi - lo), 0.0, 1.0) ** self.shape_below
        else:
            t = self.target
            below = np.clip((yy - lo) / (t - lo), 0.0, 1.0) ** self.shape_below
            above = np.clip((hi - yy) / (hi - t), 0.0, 1.0) ** self.shape_above
            d = np.where(yy <= t, below, above)
        return np.where(ok, d, 0.0)

    def margins(self, y: np.ndarray | float) -> np.ndarray:
        """For a limit to keep within: (n, 2) distances inside the lower and the upper limit,
        each scaled by the limits' size; >= 0 where met (a missing limit is always met)."""
        y = np.atleast_1d(np.asarray(y, dtype=float))
        scale = _scale(self.lower, self.upper)
        lo = (y - self.lower) / scale if self.lower is not None else np.ones_like(y)
        hi = (self.upper - y) / scale if self.upper is not None else np.ones_like(y)
        out = np.stack([lo, hi], axis=-1)
        return np.where(np.isfinite(out), out, -np.inf)

    def met(self, y: np.ndarray | float) -> np.ndarray:
        """Where a limit to keep within holds (to :data:`WITHIN_TOL` of its scale)."""
        return np.all(self.margins(y) >= -WITHIN_TOL, axis=-1)

    def to_dict(self) -> dict:
        if self.is_constraint:
            return {"goal": self.goal, "lower": self.lower, "upper": self.upper,
                    "limits_from": self.limits_from}
        return {"goal": self.goal, "lower": self.lower, "upper": self.upper,
                "target": self.target,
                "shape": [self.shape_below, self.shape_above] if self.goal == "target"
                else self.shape_below,
                "weight": self.weight, "limits_from": self.limits_from}


def _scale(lower: float | None, upper: float | None) -> float:
    if lower is not None and upper is not None:
        return max(upper - lower, 1e-300)
    return max(abs(lower if lower is not None else upper), 1.0)


def overall(d: dict[str, np.ndarray], goals: dict[str, Goal]) -> np.ndarray:
    """Overall desirability D = (prod d_i^w_i)^(1/sum w_i) over the desirability goals (limits
    to keep within are left out); 0 if any d_i is 0."""
    used = [name for name, g in goals.items() if not g.is_constraint]
    total = sum(goals[name].weight for name in used)
    with np.errstate(divide="ignore"):
        log_sum = sum(goals[name].weight * np.log(np.asarray(d[name], dtype=float))
                      for name in used)
    return np.exp(log_sum / total)


def _number(value, response: str, field: str, positive: bool = False) -> float:
    if isinstance(value, bool) or value is None:
        raise SetpointError(f"Goal for '{response}': {field} must be a number", field=field)
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise SetpointError(f"Goal for '{response}': {field} must be a number (got {value!r})",
                            field=field) from err
    if not math.isfinite(v):
        raise SetpointError(f"Goal for '{response}': {field} must be finite", field=field)
    if positive and v <= 0:
        raise SetpointError(f"Goal for '{response}': {field} must be greater than 0 (got {v:g})",
                            field=field)
    return v


def _shapes(raw, response: str, goal: str) -> tuple[float, float]:
    if raw is None:
        return 1.0, 1.0
    if isinstance(raw, (list, tuple)):
        if goal != "target" or len(raw) != 2:
            raise SetpointError(f"Goal for '{response}': shape is one number, or two "
                                "[below, above] for a target goal", field="shape")
        return (_number(raw[0], response, "shape", positive=True),
                _number(raw[1], response, "shape", positive=True))
    s = _number(raw, response, "shape", positive=True)
    return s, s


def parse_goal(response: str, spec: dict, observed: tuple[float, float] | None,
               achievable: tuple[float, float] | None = None) -> Goal:
    """Validate one goal dict ``{goal, lower, upper, target, shape, weight}``.

    ``lower`` and ``upper`` are the acceptable lower and upper values. A missing one is filled
    in. For maximize and minimize, with ``achievable`` (the least and greatest prediction inside
    the search region) given, the fully satisfying end (upper for maximize, lower for minimize)
    is the best prediction in the region, so d reaches 1 only at the region's optimum and never
    saturates over a set; the other end is the observed range's (or the region's worst
    prediction when that would not leave lower < upper). Without ``achievable``, and for
    target, both come from ``observed`` (min and max of the included runs). ``within`` (keep
    the response within limits) needs at least one limit and takes no shape or weight. Words
    of an earlier version (low, high, importance, in_range) are refused with the new name.
    Errors name the response and the field.
    """
    if not isinstance(spec, dict):
        raise SetpointError(f"Goal for '{response}' must be an object with a 'goal' field",
                            field="goal")
    refuse_old_words(response, spec)
    unknown = sorted(set(spec) - set(FIELDS))
    if unknown:
        raise SetpointError(f"Goal for '{response}': unknown field '{unknown[0]}' (allowed: "
                            f"{', '.join(FIELDS)})", field=unknown[0])
    name = str(spec.get("goal", "")).strip().lower()
    if name not in GOALS:
        raise SetpointError(f"Goal for '{response}': goal must be one of {', '.join(GOALS)} "
                            f"(got {spec.get('goal')!r})", field="goal")
    lower = None if spec.get("lower") is None else _number(spec["lower"], response, "lower")
    upper = None if spec.get("upper") is None else _number(spec["upper"], response, "upper")
    target = None if spec.get("target") is None else _number(spec["target"], response, "target")
    if name == "within":
        return _within(response, spec, lower, upper, target)
    shape_below, shape_above = _shapes(spec.get("shape"), response, name)
    weight = (1.0 if spec.get("weight") is None
              else _number(spec["weight"], response, "weight", positive=True))
    if name in ("maximize", "minimize") and target is not None:
        raise SetpointError(f"Goal for '{response}': target is only used with goal target; "
                            f"{name} uses lower and upper", field="target")
    if name == "target" and target is None:
        raise SetpointError(f"Goal for '{response}': goal target needs a target value",
                            field="target")
    limits_from = "request"
    if (lower is None or upper is None) and achievable is not None and name != "target":
        lower, upper, limits_from = _from_region(name, lower, upper, observed, achievable)
    elif lower is None or upper is None:
        if observed is None:
            missing = "lower" if lower is None else "upper"
            raise SetpointError(f"Goal for '{response}': give {missing} (no observed values to "
                                "take it from)", field=missing)
        limits_from = ("observed range" if lower is None and upper is None
                       else "request and observed range")
        lower = observed[0] if lower is None else lower
        upper = observed[1] if upper is None else upper
    if not lower < upper:
        raise SetpointError(f"Goal for '{response}': lower ({lower:g}) must be less than upper "
                            f"({upper:g})", field="lower")
    if name == "target" and not lower < target < upper:
        hint = " (limits taken from the observed range; give lower and upper)" if (
            limits_from != "request") else ""
        raise SetpointError(f"Goal for '{response}': target {target:g} must lie strictly between "
                            f"lower {lower:g} and upper {upper:g}{hint}", field="target")
    return Goal(response=response, goal=name, lower=lower, upper=upper, target=target,
                shape_below=shape_below, shape_above=shape_above, weight=weight,
                limits_from=limits_from)


def _within(response: str, spec: dict, lower: float | None, upper: float | None,
            target: float | None) -> Goal:
    """A limit to keep within: lower and/or upper only."""
    for field in ("target", "shape", "weight"):
        if spec.get(field) is not None:
            raise SetpointError(f"Goal for '{response}': {field} is not used when the response "
                                "is kept within limits (it is a constraint, not part of D)",
                                field=field)
    if lower is None and upper is None:
        raise SetpointError(f"Goal for '{response}': keeping within limits needs lower, upper "
                            "or both", field="lower")
    if lower is not None and upper is not None and not lower < upper:
        raise SetpointError(f"Goal for '{response}': lower ({lower:g}) must be less than upper "
                            f"({upper:g})", field="lower")
    return Goal(response=response, goal="within", lower=lower, upper=upper, target=target,
                weight=0.0)


def _from_region(name: str, lower: float | None, upper: float | None,
                 observed: tuple[float, float] | None,
                 achievable: tuple[float, float]) -> tuple[float, float, str]:
    """Missing maximize/minimize limits: the fully satisfying end at the region's best
    prediction, the other end at the observed range's (or the region's worst prediction)."""
    least, greatest = achievable
    parts = [] if lower is None and upper is None else ["request"]
    if name == "maximize":
        if upper is None:
            upper = greatest
            parts.append("upper: greatest prediction in the region")
        if lower is None:
            use_observed = observed is not None and observed[0] < upper
            lower = observed[0] if use_observed else least
            parts.append("lower: observed minimum" if use_observed
                         else "lower: least prediction in the region")
    else:
        if lower is None:
            lower = least
            parts.append("lower: least prediction in the region")
        if upper is None:
            use_observed = observed is not None and observed[1] > lower
            upper = observed[1] if use_observed else greatest
            parts.append("upper: observed maximum" if use_observed
                         else "upper: greatest prediction in the region")
    return lower, upper, "; ".join(parts)
