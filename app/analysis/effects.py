"""Two-level effects (twice the coded coefficient), every contrast of the two-level part of the
design, half-normal plot data and Lenth margins."""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations

import numpy as np

from .design import DesignInfo
from .fit import EXACT_FIT_RTOL, LeastSquares
from .lenth import half_normal_points, lenth
from .results import Effect
from .terms import Term, sort_key, with_hierarchy

TWO_LEVEL_KINDS = ("two_level_full_factorial", "two_level_fractional_factorial")
# Beyond this many distinct cube points the word-by-word search for alias-set names is not
# worth it; Lenth then uses the fitted terms and says so.
MAX_CONTRASTS = 4095
# An effect this small next to the largest effect is rounding noise, never active.
NOISE_RTOL = 1e-9


@dataclass(frozen=True)
class Contrast:
    """One orthogonal contrast of the two-level part: its name (the fitted term's name when the
    model has it, else the shortest word of its alias set), effect and whether it is fitted."""

    term: Term
    effect: float
    in_model: bool


def _cube_points(coded: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct ±1 settings of the cube runs and the mean response at each (centre runs out)."""
    cube = np.all(np.abs(np.abs(coded) - 1.0) < 1e-6, axis=1)
    points, labels = np.unique(np.sign(coded[cube]), axis=0, return_inverse=True)
    labels = labels.ravel()
    means = np.bincount(labels, weights=y[cube]) / np.bincount(labels)
    return points, means


def two_level_contrasts(coded: np.ndarray, y: np.ndarray,
                        terms: list[Term]) -> list[Contrast] | None:
    """Every contrast the two-level part estimates: 2^k - 1 for a full 2^k, one per alias set
    for a regular fraction. None when the cube points are not a regular two-level design.

    Effects are contrasts of the cell means at the distinct cube points (mean at + minus mean
    at -), so replicated points count once each and centre points not at all. Alias sets are
    found by searching words in order of length; a set is named by its first (shortest) word
    unless a fitted term belongs to it.
    """
    points, means = _cube_points(coded, y)
    n_points, k = points.shape
    wanted = n_points - 1
    if wanted < 1 or wanted > MAX_CONTRASTS or n_points & wanted:
        return None
    fitted = {}
    for t in terms:
        if t.is_two_level_product():
            col = np.prod(points[:, list(t.factors)], axis=1)
            fitted.setdefault((col * col[0]).astype(np.int8).tobytes(), (t, col))
    found: dict[bytes, tuple[Term, np.ndarray]] = {}
    for order in range(1, k + 1):
        for subset in combinations(range(k), order):
            col = np.prod(points[:, list(subset)], axis=1)
            key = (col * col[0]).astype(np.int8).tobytes()
            if key in found or np.all(col == col[0]):
                continue  # an alias of a set already named, or a word of the defining relation
            found[key] = fitted.get(key, (Term(tuple((i, 1) for i in subset)), col))
            if len(found) == wanted:
                break
        if len(found) == wanted:
            break
    columns = np.column_stack([col for _, col in found.values()]) if found else None
    if len(found) != wanted or not np.array_equal(columns.T @ columns, n_points * np.eye(wanted)):
        return None  # not a regular fraction: some contrasts are only partly aliased
    effects = 2.0 * (columns.T @ means) / n_points
    return [Contrast(term, float(e), key in fitted)
            for (key, (term, _)), e in zip(found.items(), effects, strict=True)]


def effects_and_lenth(design: DesignInfo, terms: list[Term], ls: LeastSquares,
                      names: tuple[str, ...], hierarchy: bool, coded: np.ndarray | None = None):
    """Effects of the fitted two-level terms, and Lenth's PSE/ME/SME from every contrast.

    ``coded`` holds the runs' coded settings. Lenth's margins come from all the contrasts the
    two-level part of the design estimates, whatever model was fitted; the document lists each
    with ``in_model`` and ``active`` (beyond ME and above rounding noise). Without ``coded``
    (or for a two-level design that is not a regular fraction) only the fitted terms can be
    used, and ``basis`` says so. Lenth needs at least three effects. ``suggested_terms`` are
    the active effects, closed under hierarchy when hierarchy is on: the reduced model offered
    for a saturated design.
    """
    if design.kind not in TWO_LEVEL_KINDS:
        return [], None, []
    offset = ls.p - len(terms)
    chosen = [(i, t) for i, t in enumerate(terms) if t.is_two_level_product()]
    effects = [Effect(t.name(names), 2.0 * float(ls.coef[offset + i]), float(ls.coef[offset + i]))
               for i, t in chosen]
    y = ls.fitted + ls.residuals
    contrasts = None if coded is None else two_level_contrasts(coded, y, terms)
    if contrasts is None:
        contrasts = [Contrast(t, e.effect, True) for (_, t), e in zip(chosen, effects, strict=True)]
        basis = "the fitted model's terms only"
    else:
        basis = "every contrast of the two-level part of the design"
    if len(contrasts) < 3:
        return effects, None, []
    values = np.array([c.effect for c in contrasts])
    # Rounding noise: relative to the largest effect or to the response's own size.
    noise = max(NOISE_RTOL * float(np.abs(values).max()),
                EXACT_FIT_RTOL * float(np.abs(y).max()))
    result = lenth(values, negligible=noise)
    is_active = [abs(c.effect) > max(result.me, noise) for c in contrasts]
    active = [c.term for c, a in zip(contrasts, is_active, strict=True) if a]
    suggested = with_hierarchy(active) if hierarchy else sorted(active, key=sort_key)
    labels = [c.term.name(names) for c in contrasts]
    doc = result.to_dict()
    doc.update(
        basis=basis,
        noise_threshold=noise,
        effects=[{"term": label, "effect": c.effect, "in_model": c.in_model, "active": a}
                 for label, c, a in zip(labels, contrasts, is_active, strict=True)],
        active=[t.name(names) for t in active],
        suggested_terms=[t.name(names) for t in suggested],
        saturated=ls.df_resid == 0,
    )
    return effects, doc, half_normal_points(labels, values, [c.in_model for c in contrasts])
