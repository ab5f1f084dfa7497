"""Two-level effects (twice the coded coefficient), half-normal plot data and Lenth margins."""

from __future__ import annotations

import numpy as np

from .design import DesignInfo
from .fit import LeastSquares
from .lenth import half_normal_points, lenth
from .results import Effect
from .terms import Term, sort_key, with_hierarchy

TWO_LEVEL_KINDS = ("two_level_full_factorial", "two_level_fractional_factorial")


def effects_and_lenth(design: DesignInfo, terms: list[Term], ls: LeastSquares,
                      names: tuple[str, ...], hierarchy: bool):
    """Effects for main effects and interactions of a two-level design, and Lenth's PSE/ME/SME.

    The model columns after the intercept and blocks are the terms, in order. Lenth needs at
    least three effects. ``suggested_terms`` are the effects beyond ME, closed under hierarchy
    when hierarchy is on: the reduced model offered for a saturated design.
    """
    if design.kind not in TWO_LEVEL_KINDS:
        return [], None, []
    offset = ls.p - len(terms)
    chosen = [(i, t) for i, t in enumerate(terms) if t.is_two_level_product()]
    effects = [Effect(t.name(names), 2.0 * float(ls.coef[offset + i]), float(ls.coef[offset + i]))
               for i, t in chosen]
    if len(effects) < 3:
        return effects, None, []
    values = np.array([e.effect for e in effects])
    result = lenth(values)
    active = [t for (_, t), e in zip(chosen, effects, strict=True) if abs(e.effect) > result.me]
    suggested = with_hierarchy(active) if hierarchy else sorted(active, key=sort_key)
    doc = result.to_dict()
    doc.update(
        active=[t.name(names) for t in active],
        suggested_terms=[t.name(names) for t in suggested],
        saturated=ls.df_resid == 0,
    )
    return effects, doc, half_normal_points([e.term for e in effects], values)
