"""Derringer–Suich desirabilities and their importance-weighted geometric mean.

Each goal maps a predicted response y to d in [0, 1]:

* maximize, limits L < U: d = 0 for y <= L, ((y - L)/(U - L))^s between, 1 for y >= U;
* minimize, limits L < U: d = 1 for y <= L, ((U - y)/(U - L))^s between, 0 for y >= U;
* target T with limits L < T < U: ((y - L)/(T - L))^s on [L, T], ((U - y)/(U - T))^t on
  [T, U], 0 outside;
* in_range, limits L and/or U: d = 1 inside, 0 outside.

The composite D = (prod d_i^r_i)^(1 / sum r_i) with importance r_i. References: Derringer &
Suich, J. Quality Technology 12 (1980) 214-219 (shapes s, t); Derringer, Quality Progress 27(6)
(1994) 51-58 (importance). Verified against values worked by hand in
tests/analysis/optimize/test_desirability.py.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .canonical import SetpointError

GOALS = ("maximize", "minimize", "target", "in_range")
FIELDS = ("goal", "target", "low", "high", "weight", "importance")


@dataclass(frozen=True)
class Goal:
    """One response's goal with its resolved limits; ``limits_from`` says where L/U came from."""

    response: str
    goal: str
    low: float | None
    high: float | None
    target: float | None = None
    weight_low: float = 1.0
    weight_high: float = 1.0
    importance: float = 1.0
    limits_from: str = "request"

    def desirability(self, y: np.ndarray | float) -> np.ndarray:
        """d for each predicted value; a value with no prediction (NaN) gets 0."""
        y = np.asarray(y, dtype=float)
        d = np.zeros_like(y)
        ok = np.isfinite(y)
        yy = np.where(ok, y, 0.0)
        lo, hi = self.low, self.high
        if self.goal == "maximize":
            frac = np.clip((yy - lo) / (hi - lo), 0.0, 1.0)
            d = frac ** self.weight_low
        elif self.goal == "minimize":
            frac = np.clip((hi - yy) / (hi - lo), 0.0, 1.0)
            d = frac ** self.weight_low
        elif self.goal == "target":
            t = self.target
            below = np.clip((yy - lo) / (t - lo), 0.0, 1.0) ** self.weight_low
            above = np.clip((hi - yy) / (hi - t), 0.0, 1.0) ** self.weight_high
            d = np.where(yy <= t, below, above)
        else:
            inside = np.ones_like(yy, dtype=bool)
            if lo is not None:
                inside &= yy >= lo
            if hi is not None:
                inside &= yy <= hi
            d = inside.astype(float)
        return np.where(ok, d, 0.0)

    def to_dict(self) -> dict:
        return {"goal": self.goal, "low": self.low, "high": self.high, "target": self.target,
                "weight": [self.weight_low, self.weight_high] if self.goal == "target"
                else self.weight_low,
                "importance": self.importance, "limits_from": self.limits_from}


def composite(d: dict[str, np.ndarray], goals: dict[str, Goal]) -> np.ndarray:
    """Importance-weighted geometric mean D = (prod d_i^r_i)^(1/sum r_i); 0 if any d_i is 0."""
    total = sum(g.importance for g in goals.values())
    arrays = [np.asarray(d[name], dtype=float) for name in goals]
    with np.errstate(divide="ignore"):
        log_sum = sum(goals[name].importance * np.log(a) for name, a in zip(goals, arrays,
                                                                             strict=True))
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


def _weights(raw, response: str, goal: str) -> tuple[float, float]:
    if raw is None:
        return 1.0, 1.0
    if isinstance(raw, (list, tuple)):
        if goal != "target" or len(raw) != 2:
            raise SetpointError(f"Goal for '{response}': weight is one number, or two "
                                "[below, above] for a target goal", field="weight")
        return (_number(raw[0], response, "weight", positive=True),
                _number(raw[1], response, "weight", positive=True))
    w = _number(raw, response, "weight", positive=True)
    return w, w


def parse_goal(response: str, spec: dict, observed: tuple[float, float] | None,
               achievable: tuple[float, float] | None = None) -> Goal:
    """Validate one goal dict ``{goal, target, low, high, weight, importance}``.

    A missing limit is filled in. For maximize and minimize, with ``achievable`` (the least and
    greatest prediction inside the search region) given, the fully desirable end (high for
    maximize, low for minimize) is the best prediction in the region, so d reaches 1 only at the
    region's optimum and never saturates over a set; the other end is the observed range's
    (or the region's worst prediction when that would not leave low < high). Without
    ``achievable``, and for target, both come from ``observed`` (min and max of the included
    runs). in_range needs at least one limit. Errors name the response and the field.
    """
    if not isinstance(spec, dict):
        raise SetpointError(f"Goal for '{response}' must be an object with a 'goal' field",
                            field="goal")
    unknown = sorted(set(spec) - set(FIELDS))
    if unknown:
        raise SetpointError(f"Goal for '{response}': unknown field '{unknown[0]}' (allowed: "
                            f"{', '.join(FIELDS)})", field=unknown[0])
    name = str(spec.get("goal", "")).strip().lower().replace(" ", "_").replace("-", "_")
    if name not in GOALS:
        raise SetpointError(f"Goal for '{response}': goal must be one of {', '.join(GOALS)} "
                            f"(got {spec.get('goal')!r})", field="goal")
    low = None if spec.get("low") is None else _number(spec["low"], response, "low")
    high = None if spec.get("high") is None else _number(spec["high"], response, "high")
    target = None if spec.get("target") is None else _number(spec["target"], response, "target")
    w_low, w_high = _weights(spec.get("weight"), response, name)
    importance = (1.0 if spec.get("importance") is None
                  else _number(spec["importance"], response, "importance", positive=True))
    if name in ("maximize", "minimize", "in_range") and target is not None:
        raise SetpointError(f"Goal for '{response}': target is only used with goal target; "
                            f"{name} uses low and high", field="target")
    if name == "target" and target is None:
        raise SetpointError(f"Goal for '{response}': goal target needs a target value",
                            field="target")
    limits_from = "request"
    if name == "in_range":
        if low is None and high is None:
            raise SetpointError(f"Goal for '{response}': in_range needs low, high or both",
                                field="low")
    elif (low is None or high is None) and achievable is not None and name != "target":
        low, high, limits_from = _from_region(name, low, high, observed, achievable)
    elif low is None or high is None:
        if observed is None:
            missing = "low" if low is None else "high"
            raise SetpointError(f"Goal for '{response}': give {missing} (no observed values to "
                                "take it from)", field=missing)
        limits_from = ("observed range" if low is None and high is None
                       else "request and observed range")
        low = observed[0] if low is None else low
        high = observed[1] if high is None else high
    if low is not None and high is not None and not low < high:
        raise SetpointError(f"Goal for '{response}': low ({low:g}) must be less than high "
                            f"({high:g})", field="low")
    if name == "target" and not low < target < high:
        hint = " (limits taken from the observed range; give low and high)" if (
            limits_from != "request") else ""
        raise SetpointError(f"Goal for '{response}': target {target:g} must lie strictly between "
                            f"low {low:g} and high {high:g}{hint}", field="target")
    return Goal(response=response, goal=name, low=low, high=high, target=target,
                weight_low=w_low, weight_high=w_high, importance=importance,
                limits_from=limits_from)


def _from_region(name: str, low: float | None, high: float | None,
                 observed: tuple[float, float] | None,
                 achievable: tuple[float, float]) -> tuple[float, float, str]:
    """Missing maximize/minimize limits: the fully desirable end at the region's best
    prediction, the other end at the observed range's (or the region's worst prediction)."""
    least, greatest = achievable
    parts = [] if low is None and high is None else ["request"]
    if name == "maximize":
        if high is None:
            high = greatest
            parts.append("high: greatest prediction in the region")
        if low is None:
            use_observed = observed is not None and observed[0] < high
            low = observed[0] if use_observed else least
            parts.append("low: observed minimum" if use_observed
                         else "low: least prediction in the region")
    else:
        if low is None:
            low = least
            parts.append("low: least prediction in the region")
        if high is None:
            use_observed = observed is not None and observed[1] > low
            high = observed[1] if use_observed else greatest
            parts.append("high: observed maximum" if use_observed
                         else "high: greatest prediction in the region")
    return low, high, "; ".join(parts)
