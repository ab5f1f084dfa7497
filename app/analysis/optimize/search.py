"""Setpoint search: multistart local optimisation in the design region, checked by a dense search.

The local search (scipy.optimize.minimize: L-BFGS-B in the cube, SLSQP with the sphere as an
inequality constraint) starts from seeded random points and the centre. An independent dense
search over the same region checks it: a grid over the cube (seeded random points for many free
factors); for the sphere, scrambled Sobol points (scipy.stats.qmc) kept inside the ball, together
with the same points pushed out radially onto its surface, where many optima lie. Both optima are
reported and ``agrees`` says whether the local search did at least as well as the dense search;
when it did not, the dense search's best point is polished and the better of the two is taken.

Constraints on predicted responses (limits to keep within) are inequality constraints: the
dense search leaves out the points that break one, and the local search runs SLSQP with them,
keeping only the answers that meet them.

The local search sees the objective shifted and scaled by its median and spread over the dense
points, so the stopping rules act alike whatever the units or offset of the response.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize
from scipy.stats import qmc

from .region import TOL, Region

GRID_POINTS = 20_000   # evaluations for the check; vectorised, a few milliseconds per response
DESIRABILITY_TOL = 1e-3


@dataclass(frozen=True)
class SearchResult:
    """Best point (full coded vector), its objective, and the grid check."""

    coded: np.ndarray
    objective: float
    local_objective: float
    local_coded: np.ndarray | None
    grid_objective: float
    grid_coded: np.ndarray
    grid_points: int
    grid_method: str
    agrees: bool
    source: str
    starts: int
    dense_coded: np.ndarray | None = None   # every dense point (full coded rows)
    dense_values: np.ndarray | None = None  # the objective there (inf where undefined)
    tolerance: float = 0.0


def _embed(region: Region, free_values: np.ndarray) -> np.ndarray:
    free_values = np.atleast_2d(free_values)
    full = np.zeros((free_values.shape[0], len(region.factors)))
    for i, v in region.fixed.items():
        full[:, i] = v
    full[:, region.free] = free_values
    return full


def _candidates(region: Region, rng: np.random.Generator) -> tuple[np.ndarray, str]:
    free = region.free
    lo, hi = region.lower[free], region.upper[free]
    m = len(free)
    if region.kind == "sphere":
        return _ball_points(region, rng), "Sobol points in the ball and on its surface"
    per_axis = min(101, max(3, int(round(GRID_POINTS ** (1.0 / m)))))
    if per_axis**m <= 3 * GRID_POINTS:
        axes = [np.linspace(a, b, per_axis) for a, b in zip(lo, hi, strict=True)]
        points, method = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, m), "grid"
    else:
        points, method = lo + (hi - lo) * rng.random((GRID_POINTS, m)), "random"
    return points[region.in_design_region(_embed(region, points))], method


def _ball_points(region: Region, rng: np.random.Generator) -> np.ndarray:
    """Scrambled Sobol points over the free factors' box, kept where inside the region, plus
    each point scaled out to the sphere's surface (kept where that is within the bounds)."""
    free = region.free
    lo, hi = region.lower[free], region.upper[free]
    sobol = qmc.Sobol(d=len(free), scramble=True, seed=rng)
    box = lo + (hi - lo) * sobol.random_base2(int(np.ceil(np.log2(GRID_POINTS // 2))))
    fixed_sq = sum(v**2 for v in region.fixed.values())
    room = np.sqrt(max(region.radius**2 - fixed_sq, 0.0))
    norms = np.sqrt(np.sum(box**2, axis=1))
    surface = box[norms > 0] * (room / norms[norms > 0])[:, None]
    points = np.vstack([box, surface])
    keep = (region.in_design_region(_embed(region, points))
             & np.all(points >= lo - TOL, axis=1) & np.all(points <= hi + TOL, axis=1))
    return points[keep]


def _starts(region: Region, rng: np.random.Generator) -> np.ndarray:
    free = region.free
    lo, hi = region.lower[free], region.upper[free]
    wanted = 8 + 2 * len(free)
    starts = [np.clip(0.0, lo, hi)]
    for _ in range(50):
        draw = lo + (hi - lo) * rng.random((wanted, len(free)))
        starts.extend(draw[region.in_design_region(_embed(region, draw))])
        if len(starts) >= wanted:
            break
    return np.array(starts[:wanted])


Margins = Callable[[np.ndarray], np.ndarray]   # full coded rows -> (n, m), >= 0 where met


def _local(region: Region, objective: Callable[[np.ndarray], np.ndarray], start: np.ndarray,
           offset: float = 0.0, scale: float = 1.0, constraints: Margins | None = None):
    free = region.free
    bounds = list(zip(region.lower[free], region.upper[free], strict=True))

    def f(z: np.ndarray) -> float:
        return (float(objective(_embed(region, z))[0]) - offset) / scale

    with warnings.catch_warnings():
        # SLSQP may step a hair past a bound and says so; the point is clipped just below
        warnings.filterwarnings("ignore", message="Values in x were outside bounds",
                                category=RuntimeWarning)
        cons = []
        if constraints is not None:
            cons.append({"type": "ineq", "fun": lambda z: constraints(_embed(region, z))[0]})
        if region.kind == "sphere":
            fixed_sq = sum(v**2 for v in region.fixed.values())
            cons.append({"type": "ineq", "fun": lambda z: region.radius**2 - fixed_sq - z @ z,
                         "jac": lambda z: -2.0 * z})
        if cons:
            res = optimize.minimize(f, start, method="SLSQP", bounds=bounds, constraints=cons,
                                    options={"maxiter": 200, "ftol": 1e-10})
        else:
            res = optimize.minimize(f, start, method="L-BFGS-B", bounds=bounds,
                                    options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 500})
    z = np.clip(res.x, region.lower[free], region.upper[free])
    full = _embed(region, z)[0]
    if region.kind == "sphere":
        norm = float(np.sqrt(full @ full))
        if norm > region.radius:
            fixed_sq = sum(v**2 for v in region.fixed.values())
            scale = np.sqrt(max(region.radius**2 - fixed_sq, 0.0) / max(z @ z, 1e-300))
            full = _embed(region, z * min(scale, 1.0))[0]
    return full, float(objective(full[None, :])[0])


def search(region: Region, objective: Callable[[np.ndarray], np.ndarray], seed: int = 0,
           tolerance: float | None = None, constraints: Margins | None = None,
           feasible: Callable[[np.ndarray], np.ndarray] | None = None) -> SearchResult:
    """Minimise a vectorised ``objective`` (rows of full coded points -> values) over ``region``.

    ``tolerance`` is the objective slack allowed between the local and the grid optimum for them
    to agree (default: 1e-3 of the objective's spread over the grid). Verified in
    tests/analysis/optimize/test_search.py (stays inside, respects bounds and fixed values,
    matches the grid and known optima).

    ``constraints`` maps full coded rows to an (n, m) array of margins, each >= 0 where a
    constraint is met (smooth, for SLSQP); ``feasible`` maps rows to booleans with the
    tolerance the caller reports with. Points that are not feasible are never chosen.
    Verified in tests/analysis/optimize/test_within.py against a dense brute-force grid.
    """
    if feasible is None and constraints is not None:
        def feasible(rows):
            return np.all(constraints(rows) >= 0, axis=-1)
    rng = np.random.default_rng(seed)
    if not region.free:
        point = _embed(region, np.zeros((1, 0)))[0]
        value = float(objective(point[None, :])[0])
        return SearchResult(point, value, value, point, value, point, 1, "fixed", True, "fixed", 0)
    points, method = _candidates(region, rng)
    if len(points) == 0:
        points = np.clip(0.0, region.lower[region.free], region.upper[region.free])[None, :]
    values = objective(_embed(region, points))
    values = np.where(np.isfinite(values), values, np.inf)
    if feasible is not None:
        values = np.where(feasible(_embed(region, points)), values, np.inf)
    g = int(np.argmin(values))
    grid_coded, grid_value = _embed(region, points[g])[0], float(values[g])
    finite = values[np.isfinite(values)]
    spread = float(finite.max() - finite.min()) if finite.size else 0.0
    offset = float(np.median(finite)) if finite.size else 0.0
    scale = spread if spread > 0 else 1.0
    if tolerance is None:
        tolerance = 1e-3 * spread + 1e-12
    starts = _starts(region, rng)
    best, best_value = None, np.inf
    for start in starts:
        point, value = _local(region, objective, start, offset, scale, constraints)
        if (np.isfinite(value) and value < best_value and region.inside(point)
                and _allowed(feasible, point)):
            best, best_value = point, value
    local_value, local_coded = best_value, best
    agrees = bool(local_value <= grid_value + tolerance)
    source = "local"
    if not agrees:
        point, value = _local(region, objective, points[g], offset, scale, constraints)
        best, best_value, source = ((point, value, "grid, polished")
                                    if value < grid_value and region.inside(point)
                                    and _allowed(feasible, point)
                                    else (grid_coded, grid_value, "grid"))
    return SearchResult(coded=best, objective=float(best_value), local_objective=float(local_value),
                        local_coded=local_coded,
                        grid_objective=grid_value, grid_coded=grid_coded, grid_points=len(points),
                        grid_method=method, agrees=agrees, source=source, starts=len(starts),
                        dense_coded=_embed(region, points), dense_values=values,
                        tolerance=float(tolerance))


def _allowed(feasible, point: np.ndarray) -> bool:
    return feasible is None or bool(feasible(point[None, :])[0])
