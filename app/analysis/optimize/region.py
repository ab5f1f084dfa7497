"""The design region a setpoint may come from, in coded units, with bounds and fixed factors.

The region follows the design (:func:`region_for_design`): the sphere through the axial points
of a rotatable or spherical central composite design, else the coded cube [-1, 1]^k. Outside it
the model is extrapolating: requests that leave it are refused with a message naming the
factor, never clipped silently.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..design import describe_design
from .canonical import SetpointError

# Coded-unit slack for "on the boundary": far below any meaningful setting change, above the
# rounding of actual values typed to a few decimals and of optimiser steps.
TOL = 1e-7
# A proposal within this many coded units of the design region's boundary is on its edge.
EDGE_TOL = 1e-3


class OutsideRegion(SetpointError):
    """A request (bound, fixed value, point) that leaves the design region."""


@dataclass(frozen=True)
class FactorScale:
    """Coding of one factor: coded = (actual - centre) / half_range; (0, 1) when already coded."""

    name: str
    centre: float
    half_range: float
    units: str | None = None

    @classmethod
    def from_dict(cls, d: dict) -> FactorScale:
        if d.get("low") is None:
            return cls(d["name"], 0.0, 1.0, d.get("units"))
        low, high = float(d["low"]), float(d["high"])
        return cls(d["name"], (low + high) / 2.0, (high - low) / 2.0, d.get("units"))

    def to_coded(self, actual: float) -> float:
        return float((actual - self.centre) / self.half_range)

    def to_actual(self, coded: float) -> float:
        return float(self.centre + self.half_range * coded)

    def describe(self, coded: float) -> str:
        unit = f" {self.units}" if self.units else ""
        return f"{self.to_actual(coded):.6g}{unit}"


# |alpha - target| below this counts as equal: the rotatable alpha (n_F)^(1/4) and the spherical
# alpha sqrt(k) are printed to three decimals in design tables (1.682, 1.414, 1.732).
ALPHA_TOL = 0.01


@dataclass(frozen=True)
class RegionChoice:
    """The design region the setpoint search keeps to: ``shape`` ``sphere`` (``radius`` in coded
    units) or ``cube`` ([-1, 1] per factor, ``radius`` None), and ``why`` in one sentence."""

    shape: str
    radius: float | None
    why: str


def _as_run(design: dict | None, runs: list | None) -> dict | None:
    """The design as planned and run: recognised again from every run, excluded ones included.

    Excluding a run (a scratched panel) changes what the model is fitted to, not the region the
    experiment explored; recognising the design from the included runs alone would turn a
    rotatable design into a "general" one and shrink the search to the cube.
    """
    rows = [r.get("coded") for r in runs or [] if isinstance(r.get("coded"), dict)]
    if not rows:
        return design
    names = list(rows[0])
    if not names or any(list(r) != names or any(v is None for v in r.values()) for r in rows):
        return design
    return describe_design(np.array([[float(r[n]) for n in names] for r in rows])).to_dict()


def region_for_design(design: dict | None, runs: list | None = None) -> RegionChoice:
    """The one rule for the setpoint search region, read from a fit's ``design`` part and runs.

    * Central composite designs that are rotatable (alpha = n_F^(1/4)) or spherical
      (alpha = sqrt(k), every non-centre point on one sphere): the sphere through the axial
      points. Its radius is read from the runs (the largest coded distance of an axial run, which
      also covers inscribed designs with axial points at +/-1), else alpha.
    * Face-centred central composite designs, two-level factorials, Box–Behnken designs, other
      central composite designs and anything unrecognised: the cube [-1, 1].

    Box–Behnken designs put every non-centre run on the sphere of radius sqrt(2), but no factor
    was ever run beyond +/-1: the sphere would send one factor alone to +/-1.41, a level never
    tested, so we keep to the cube, in which each factor stays within its tested levels. A
    central composite design whose alpha is neither rotatable nor spherical has no region in
    which it is balanced; the cube is where all factors were varied together.

    The design is recognised from every run, excluded ones included (see :func:`_as_run`).
    Verified in tests/analysis/optimize/test_region_rule.py.
    """
    info = _as_run(design, runs) or {}
    kind = info.get("kind")
    k = info.get("n_factors")
    alpha = info.get("alpha")
    if kind == "central_composite" and alpha is not None and info.get("ccd_type") != "face_centred":
        spherical = k is not None and k > 1 and abs(alpha - np.sqrt(k)) < ALPHA_TOL
        if info.get("rotatable") or spherical:
            radius = _axial_distance(runs)
            if radius is None:
                radius = float(alpha) if info.get("ccd_type") != "inscribed" else 1.0
            what = "rotatable" if info.get("rotatable") else "spherical"
            return RegionChoice("sphere", float(radius),
                                f"A {what} central composite design (alpha {alpha:.4g}) explores "
                                f"a ball: the search keeps to the sphere through its axial "
                                f"points, radius {radius:.4g} coded units.")
        return RegionChoice("cube", None,
                            f"A central composite design with alpha {alpha:.4g} is neither "
                            "rotatable nor spherical: the search keeps to the cube [-1, 1] in "
                            "which all factors were varied together.")
    if kind == "central_composite":
        return RegionChoice("cube", None, "A face-centred central composite design explores "
                            "the cube: the search keeps to [-1, 1] for every factor.")
    if kind in ("two_level_full_factorial", "two_level_fractional_factorial"):
        return RegionChoice("cube", None, "A two-level factorial design explores the cube: the "
                            "search keeps to [-1, 1] for every factor.")
    if kind == "box_behnken":
        return RegionChoice("cube", None, "A Box–Behnken design never runs a factor beyond its "
                            "low and high levels, so the search keeps to the cube [-1, 1] rather "
                            "than the sphere of radius 1.414 through its points.")
    return RegionChoice("cube", None, "The design is not one with a known spherical region, so "
                        "the search keeps to the cube [-1, 1] of the factors' low and high "
                        "levels.")


def _axial_distance(runs: list | None) -> float | None:
    """Largest coded value of a run with exactly one non-zero factor (an axial run), any run."""
    axial = []
    for run in runs or []:
        values = [abs(v) for v in (run.get("coded") or {}).values() if v is not None]
        nonzero = [v for v in values if v > 1e-4]
        if len(nonzero) == 1 and len(values) > 1:
            axial.append(nonzero[0])
    return max(axial) if axial else None


def design_region(design: dict | None, runs: list | None = None) -> tuple[str, float | None]:
    """(shape, radius) of :func:`region_for_design`, for callers that need no reason."""
    choice = region_for_design(design, runs)
    return choice.shape, choice.radius


@dataclass(frozen=True)
class Region:
    """Where the search may go: the design region cut by bounds, with some factors fixed.

    ``lower``/``upper`` are coded bounds per factor (the region's own box when none was given);
    ``fixed`` maps factor index to its coded value.
    """

    kind: str
    radius: float | None
    factors: tuple[FactorScale, ...]
    lower: np.ndarray
    upper: np.ndarray
    fixed: dict[int, float] = field(default_factory=dict)
    why: str = ""

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.factors)

    @property
    def free(self) -> list[int]:
        return [i for i in range(len(self.factors)) if i not in self.fixed]

    def in_design_region(self, coded: np.ndarray) -> np.ndarray:
        """Row-wise: is each coded point inside the cube or sphere (bounds not considered)?"""
        x = np.atleast_2d(np.asarray(coded, dtype=float))
        if self.kind == "sphere":
            return np.sqrt(np.sum(x**2, axis=1)) <= self.radius + TOL
        return np.all(np.abs(x) <= 1.0 + TOL, axis=1)

    def tested(self, coded: np.ndarray) -> np.ndarray:
        """Row-wise: does each coded point lie where the runs spanned, i.e. in the design region
        or in the cube [-1, 1] of the low and high levels? For a rotatable design with three or
        more factors the cube's corners (distance sqrt(k)) were run yet lie beyond the axial
        sphere; a prediction there is no extrapolation, though the search keeps to the sphere."""
        x = np.atleast_2d(np.asarray(coded, dtype=float))
        return self.in_design_region(x) | np.all(np.abs(x) <= 1.0 + TOL, axis=1)

    def inside(self, coded) -> bool:
        """True when one coded point (array, or dict by factor name) is in the design region,
        within the bounds and at the fixed values."""
        x = self.as_array(coded)
        return bool(self.in_design_region(x)[0] and np.all(x >= self.lower - TOL)
                    and np.all(x <= self.upper + TOL)
                    and all(abs(x[i] - v) <= TOL for i, v in self.fixed.items()))

    def as_array(self, coded) -> np.ndarray:
        if isinstance(coded, dict):
            missing = [n for n in self.names if n not in coded]
            if missing:
                raise SetpointError(f"No coded value for factor '{missing[0]}'", field=missing[0])
            return np.array([float(coded[n]) for n in self.names])
        return np.asarray(coded, dtype=float).ravel()

    def require_inside(self, coded, what: str = "The point") -> None:
        """Raise :class:`OutsideRegion` naming the factor (or, for the sphere, the distance)."""
        x = self.as_array(coded)
        for i, f in enumerate(self.factors):
            if x[i] < self.lower[i] - TOL or x[i] > self.upper[i] + TOL:
                raise OutsideRegion(
                    f"{what} sets '{f.name}' to {f.describe(x[i])}, outside its allowed range "
                    f"{f.describe(self.lower[i])} to {f.describe(self.upper[i])}", field=f.name)
        if not self.in_design_region(x)[0]:
            dist = float(np.sqrt(np.sum(x**2)))
            worst = self.names[int(np.argmax(np.abs(x)))]
            raise OutsideRegion(
                f"{what} lies {dist:.4g} coded units from the centre, beyond the design region's "
                f"radius {self.radius:.4g} (largest coded setting: '{worst}')", field=worst)

    def edge(self, coded) -> dict | None:
        """Where a proposal touches the boundary of the region searched, past which the design
        gives the model little or no support: the free factors at the low or high end of their
        range in the search (cube), or the point on the sphere; None inside. A bound the
        engineer set inside the region is their choice, not the region's edge, and a fixed
        factor is where it was put. Callers ask only when more could lie beyond (a goal to
        maximize or minimize, or one not fully met)."""
        x = self.as_array(coded)
        beyond = ("the best setting may lie beyond it, where the design gives the model little "
                  "or no support. Runs past this edge (an extension of the design) would tell; "
                  "the model alone does not support moving the process there.")
        if self.kind == "sphere":
            distance = float(np.sqrt(np.sum(x**2)))
            if distance < self.radius - EDGE_TOL:
                return None
            return {"shape": "sphere", "factors": [],
                    "note": (f"The proposal lies on the boundary of the region searched (the "
                             f"sphere {self.radius:.4g} coded units from the centre): " + beyond)}
        on = [i for i in self.free if abs(x[i]) >= 1.0 - EDGE_TOL]
        if not on:
            return None
        sides = {i: "high" if x[i] > 0 else "low" for i in on}
        named = "; ".join(f"{self.factors[i].name} at the {sides[i]} end of its range "
                          f"({self.factors[i].describe(x[i])})" for i in on)
        return {"shape": "cube",
                "factors": [{"factor": self.factors[i].name, "side": sides[i],
                             "setting": self.factors[i].to_actual(x[i])} for i in on],
                "note": f"The proposal sits on the edge of the region searched ({named}): "
                        + beyond}

    def to_dict(self) -> dict:
        return {"kind": self.kind, "shape": self.kind, "why": self.why, "radius": self.radius,
                "bounds": {f.name: {"coded": [float(self.lower[i]), float(self.upper[i])],
                                    "actual": [f.to_actual(self.lower[i]),
                                               f.to_actual(self.upper[i])]}
                           for i, f in enumerate(self.factors)},
                "fixed": {self.factors[i].name: self.factors[i].to_actual(v)
                          for i, v in sorted(self.fixed.items())}}


def _actual_number(value, name: str, what: str) -> float:
    if isinstance(value, bool):
        raise SetpointError(f"{what} for '{name}' must be a number", field=name)
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise SetpointError(f"{what} for '{name}' must be a number (got {value!r})",
                            field=name) from err
    if not np.isfinite(v):
        raise SetpointError(f"{what} for '{name}' must be finite", field=name)
    return v


def _bound_pair(raw, name: str) -> tuple[float | None, float | None]:
    if isinstance(raw, dict):
        unknown = sorted(set(raw) - {"low", "high"})
        if unknown:
            raise SetpointError(f"Bound for '{name}': unknown field '{unknown[0]}' (use low, high)",
                                field=name)
        lo, hi = raw.get("low"), raw.get("high")
    elif isinstance(raw, (list, tuple)) and len(raw) == 2:
        lo, hi = raw
    else:
        raise SetpointError(f"Bound for '{name}' must be [low, high] or {{low, high}}", field=name)
    return (None if lo is None else _actual_number(lo, name, "Bound"),
            None if hi is None else _actual_number(hi, name, "Bound"))


def build_region(factors: list[dict], kind: str, radius: float | None,
                 bounds: dict | None = None, fixed: dict | None = None, why: str = "") -> Region:
    """The search region: ``bounds`` {factor: [low, high]} and ``fixed`` {factor: value} in
    actual units (None for either end of a bound keeps the region's edge).

    Refuses, naming the factor, a name that is not a factor, a bound with low > high, a bound or
    fixed value outside the design region, a fixed value outside its own bound, and bounds with
    fixed values that leave no point inside the sphere.
    """
    scales = tuple(FactorScale.from_dict(f) for f in factors)
    names = [s.name for s in scales]
    edge = 1.0 if kind == "cube" else float(radius)
    lower, upper = np.full(len(scales), -edge), np.full(len(scales), edge)
    for label, given in (("bounds", bounds), ("fixed", fixed)):
        if given is not None and not isinstance(given, dict):
            raise SetpointError(f"{label} must be an object keyed by factor name", field=label)
        for name in (given or {}):
            if name not in names:
                raise SetpointError(f"{label} names '{name}', which is not a factor of the fits "
                                    f"({', '.join(names)})", field=name)
    for name, raw in (bounds or {}).items():
        i = names.index(name)
        f = scales[i]
        lo, hi = _bound_pair(raw, name)
        c_lo = -edge if lo is None else f.to_coded(lo)
        c_hi = edge if hi is None else f.to_coded(hi)
        if c_lo > c_hi + TOL:
            raise SetpointError(f"Bound for '{name}': low must not exceed high", field=name)
        for c in (c_lo, c_hi):
            if abs(c) > edge + TOL:
                raise OutsideRegion(
                    f"Bound for '{name}' ({f.describe(c)}) leaves the design region, which spans "
                    f"{f.describe(-edge)} to {f.describe(edge)}", field=name)
        lower[i], upper[i] = c_lo, c_hi
    coded_fixed: dict[int, float] = {}
    for name, raw in (fixed or {}).items():
        i = names.index(name)
        f = scales[i]
        c = f.to_coded(_actual_number(raw, name, "Fixed value"))
        if abs(c) > edge + TOL:
            raise OutsideRegion(
                f"Fixed value for '{name}' ({f.describe(c)}) leaves the design region, which "
                f"spans {f.describe(-edge)} to {f.describe(edge)}", field=name)
        if c < lower[i] - TOL or c > upper[i] + TOL:
            raise OutsideRegion(f"Fixed value for '{name}' ({f.describe(c)}) is outside its "
                                "bound", field=name)
        coded_fixed[i] = c
    if scales and len(coded_fixed) == len(scales):
        raise SetpointError("Every factor is fixed, so nothing is left to search; ask for a "
                            "prediction at these settings instead", field=names[-1])
    region = Region(kind=kind, radius=None if kind == "cube" else float(radius), factors=scales,
                    lower=lower, upper=upper, fixed=coded_fixed, why=why)
    if kind == "sphere":
        # the box point nearest the centre must lie in the sphere, else nothing does
        nearest = np.clip(0.0, lower, upper)
        for i, v in coded_fixed.items():
            nearest[i] = v
        if not region.in_design_region(nearest)[0]:
            worst = names[int(np.argmax(np.abs(nearest)))]
            raise OutsideRegion("Bounds and fixed values leave no setting inside the design "
                                f"region (a sphere of radius {radius:.4g} coded units); "
                                f"relax '{worst}'", field=worst)
    return region


@dataclass(frozen=True)
class Fits:
    """Several fits' documents checked to share factors; their common design region."""

    results: dict[str, dict]
    factors: list[dict]
    kind: str
    radius: float | None
    note: str | None
    why: str = ""


def _same_factor(a: dict, b: dict) -> bool:
    if a.get("name") != b.get("name") or (a.get("low") is None) != (b.get("low") is None):
        return False
    if a.get("low") is None:
        return True
    return bool(np.isclose(float(a["low"]), float(b["low"]), rtol=1e-12, atol=0.0)
                and np.isclose(float(a["high"]), float(b["high"]), rtol=1e-12, atol=0.0))


def load_fits(results_by_response: dict[str, dict]) -> Fits:
    """Check result documents keyed by response: each has a model, all share factor names,
    order and coding. The region is the common one; when fits disagree (e.g. an exclusion
    turned one design into a general one) the cube is used and ``note`` says so."""
    if not isinstance(results_by_response, dict) or not results_by_response:
        raise SetpointError("At least one fit is needed", field="fits")
    first_name, factors, regions = None, None, {}
    for response, result in results_by_response.items():
        if not isinstance(result, dict) or not isinstance(result.get("model"), dict):
            raise SetpointError(f"Fit for '{response}' is not a result document with a model",
                                field="fits")
        if result.get("response") not in (None, response):
            raise SetpointError(f"Fit given for '{response}' models '{result['response']}'",
                                field="fits")
        these = result["model"].get("factors") or []
        categorical = [f["name"] for f in these if f.get("levels") is not None]
        if categorical:
            # the callers reduce each model to its continuous factors first (levels.at_levels)
            raise SetpointError(
                f"The fit for '{response}' has categorical factor(s) {', '.join(categorical)}: "
                "the search runs with each at one level", field="factors")
        if factors is None:
            first_name, factors = response, these
        elif len(these) != len(factors) or not all(
                _same_factor(a, b) for a, b in zip(these, factors, strict=True)):
            def show(fs):
                return ", ".join(f"{f['name']} [{f.get('low')}, {f.get('high')}]" for f in fs)
            raise SetpointError(f"Fits must share the same factors and coding: '{response}' has "
                                f"{show(these)} but '{first_name}' has {show(factors)}",
                                field="factors")
        regions[response] = region_for_design(result.get("design"), result.get("runs"))
    kinds = {(c.shape, c.radius) for c in regions.values()}
    if len(kinds) == 1:
        choice = next(iter(regions.values()))
        kind, radius, why, note = choice.shape, choice.radius, choice.why, None
    else:
        kind, radius = "cube", None
        note = ("The fits describe the design differently ("
                + "; ".join(f"{r}: {c.shape}" for r, c in regions.items())
                + "), so the search keeps to the coded cube")
        why = "The fits describe the design differently, so the search keeps to the cube [-1, 1]."
    return Fits(results=results_by_response, factors=list(factors), kind=kind, radius=radius,
                note=note, why=why)


def observed_range(result: dict) -> tuple[float, float] | None:
    """(min, max) of the recorded response over the included runs, or None without runs."""
    values = [r["observed"] for r in result.get("runs") or []
              if not r.get("excluded") and r.get("observed") is not None]
    return (float(min(values)), float(max(values))) if values else None
