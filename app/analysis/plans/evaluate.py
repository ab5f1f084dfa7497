"""Judging a plan before it is run: what the model can estimate and how well.

For the model matrix X of the planned runs (intercept, block effect columns, terms in coded
units, through :mod:`app.analysis.terms`): VIF per term, leverage per run, D-efficiency, the
scaled prediction variance N x'(X'X)^-1 x over the design region and along its radius, and the
power of the t test of each coefficient.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..terms import block_columns, model_matrix, named_model
from .factors import PlanError

MODELS = ("linear", "interaction", "quadratic")
DEFAULT_MODEL = {"full_factorial": "linear", "fractional_factorial": "linear",
                 "central_composite": "quadratic", "box_behnken": "quadratic"}
REGION_POINTS = 4000
PROFILE_RADII = 11
PROFILE_DIRECTIONS = 400
_RANK_TOL = 1e-9


def _coded_runs(plan: dict) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The continuous factors' coded settings, and each run's block; a plan crossed with
    categorical factors fits each combination of their levels (and block) as a fixed effect,
    like a block, so the continuous terms are evaluated within the levels."""
    names = [f["name"] for f in plan["factors"] if f.get("levels") is None]
    crossed = [f["name"] for f in plan["factors"] if f.get("levels") is not None]
    coded = np.array([[run["coded"][n] for n in names] for run in plan["runs"]], dtype=float)
    blocks = [str(run["block"]) + "".join(f"|{run['coded'][n]}" for n in crossed)
              for run in plan["runs"]]
    return coded, np.array(blocks), names


def _estimable(matrix: np.ndarray, fixed: int, term_cols: list[np.ndarray], term_names):
    """Terms whose column adds rank, in model order; the others with what they are aliased
    with (the earlier columns that reproduce them)."""
    kept_cols, kept, lost = [matrix[:, :fixed]], [], []
    for name, col in zip(term_names, term_cols, strict=True):
        current = np.hstack(kept_cols)
        coef, *_ = np.linalg.lstsq(current, col, rcond=None)
        if np.linalg.norm(col - current @ coef) > _RANK_TOL * max(1.0, np.linalg.norm(col)):
            kept_cols.append(col)
            kept.append(name)
            continue
        partners = [n for n, c in zip(["Intercept", *([None] * (fixed - 1)), *kept],
                                      coef.ravel(), strict=True) if n and abs(c) > 1e-8]
        lost.append({"term": name, "aliased_with": partners})
    return np.hstack(kept_cols), kept, lost


def _region(plan: dict, coded: np.ndarray) -> tuple[str, float]:
    """A sphere through the farthest design point for a spherical design (rotatable,
    orthogonally blocked or inscribed central composite, Box–Behnken), else the cube
    [-1, 1]^k (factorials, face-centred central composite)."""
    axial = plan.get("axial_distance") or {}
    if plan["design"] == "box_behnken" or axial.get("kind") in ("rotatable", "orthogonal",
                                                                   "inscribed"):
        return "sphere", float(np.max(np.linalg.norm(coded, axis=1)))
    return "cube", 1.0


def _directions(rng, n: int, k: int) -> np.ndarray:
    d = rng.standard_normal((n, k))
    return d / np.linalg.norm(d, axis=1, keepdims=True)


def evaluate_plan(plan: dict, model: str | None = None, *, effect: float | None = None,
                  sigma: float | None = None, alpha: float = 0.05) -> dict:
    """What the plan can estimate for ``model`` (linear, interaction or quadratic; by default
    linear for two-level designs and quadratic for response-surface designs).

    Power per term is that of the two-sided t test (as an F test with 1 df and noncentrality
    ((effect / 2) / (sigma sqrt(c_jj)))^2, c = (X'X)^-1) to detect a change of ``effect`` from
    low to high (twice the coded coefficient) against noise SD ``sigma`` with the model's
    residual df; None when effect or sigma is missing, or no residual df is left.
    """
    if model is None:
        model = DEFAULT_MODEL[plan["design"]]
    if model not in MODELS:
        raise PlanError(f"choose the model from {', '.join(MODELS)}", "model")
    if not 0 < alpha < 1:
        raise PlanError("alpha is between 0 and 1", "alpha")
    for value, field in ((effect, "effect"), (sigma, "sigma")):
        if value is not None and not (np.isfinite(value) and value > 0):
            raise PlanError("give a positive number", field)
    coded, blocks, names = _coded_runs(plan)
    n, k = coded.shape
    terms = named_model(model, k)
    term_names = [t.name(tuple(names)) for t in terms]
    block_cols = block_columns(blocks)[0] if len(set(blocks.tolist())) > 1 else None
    full = model_matrix(coded, terms, block_cols)
    fixed = full.shape[1] - len(terms)
    x, kept, lost = _estimable(full, fixed, [full[:, [fixed + j]] for j in range(len(terms))],
                               term_names)
    p = x.shape[1]
    df = n - p
    notes = []
    if any(f.get("levels") is not None for f in plan["factors"]):
        notes.append("Each combination of the categorical factors' levels is fitted as a fixed "
                     "effect, like a block; the terms below are the continuous factors' within "
                     "the levels (their interactions with the categorical factors are not "
                     "evaluated here).")
    if lost:
        notes.append("Not estimable in this plan (aliased with earlier terms): "
                     + ", ".join(item["term"] for item in lost) + "; they are left out below.")
    xtx_inv = np.linalg.inv(x.T @ x)
    centred = x[:, fixed:] - x[:, fixed:].mean(axis=0)
    vif = np.diag(xtx_inv)[fixed:] * np.sum(centred**2, axis=0)
    leverage = np.einsum("ij,jk,ik->i", x, xtx_inv, x)
    power = _power(np.diag(xtx_inv)[fixed:], kept, df, effect, sigma, alpha, notes)
    return {
        "model": model, "terms": kept, "inestimable": lost, "runs": n, "parameters": p,
        "residual_df": df, "resolution": plan.get("resolution"),
        "vif": {name: float(v) for name, v in zip(kept, vif, strict=True)},
        "leverage": {"per_run": [{"label": run["label"], "leverage": float(h)}
                                 for run, h in zip(plan["runs"], leverage, strict=True)],
                     "max": float(leverage.max()), "mean": float(leverage.mean())},
        "d_efficiency": float(np.linalg.det(x.T @ x / n) ** (1.0 / p)),
        "prediction_variance": _prediction_variance(plan, coded, terms, kept, term_names,
                                                    fixed, xtx_inv, n),
        "power": power, "notes": notes}


def _power(c_diag, kept, df, effect, sigma, alpha, notes) -> dict:
    out = {"effect": effect, "sigma": sigma, "alpha": alpha, "df": df,
           "per_term": {name: None for name in kept}}
    if effect is None or sigma is None:
        notes.append("Power needs both the effect to detect and the noise SD (sigma).")
        return out
    if df <= 0:
        notes.append("No residual degrees of freedom: no t test, so no power; add runs or "
                     "centre points, or drop terms.")
        return out
    critical = stats.f.isf(alpha, 1, df)
    noncentrality = (effect / 2.0) ** 2 / (sigma**2 * c_diag)
    values = stats.ncf.sf(critical, 1, df, noncentrality)
    out["per_term"] = {name: float(v) for name, v in zip(kept, values, strict=True)}
    return out


def _prediction_variance(plan, coded, terms, kept, term_names, fixed, xtx_inv, n) -> dict:
    """N x'(X'X)^-1 x at points drawn uniformly in the region (seeded from the plan), and its
    min / mean / max on spheres of growing radius. Block columns are zero: the prediction is
    the average over blocks."""
    k = coded.shape[1]
    keep = [term_names.index(name) for name in kept]
    rng = np.random.default_rng(plan["seed"])
    region, radius = _region(plan, coded)
    if region == "cube":
        points = rng.uniform(-1.0, 1.0, size=(REGION_POINTS, k))
    else:
        points = (_directions(rng, REGION_POINTS, k)
                  * radius * rng.uniform(size=(REGION_POINTS, 1)) ** (1.0 / k))

    def spv(at: np.ndarray) -> np.ndarray:
        rows = model_matrix(at, [terms[j] for j in keep])
        rows = np.hstack([rows[:, :1], np.zeros((len(at), fixed - 1)), rows[:, 1:]])
        return n * np.einsum("ij,jk,ik->i", rows, xtx_inv, rows)

    inside = spv(points)
    directions = _directions(rng, PROFILE_DIRECTIONS, k)
    profile = []
    for r in np.linspace(0.0, radius if region == "sphere" else np.sqrt(k), PROFILE_RADII):
        values = spv(directions * r)
        profile.append({"radius": float(r), "min": float(values.min()),
                        "mean": float(values.mean()), "max": float(values.max())})
    return {"region": region, "radius": radius, "points": REGION_POINTS,
            "min": float(inside.min()), "mean": float(inside.mean()),
            "max": float(inside.max()), "profile": profile}
