"""Backward reduction of model terms at a stated alpha, keeping hierarchy."""

from __future__ import annotations

from collections.abc import Callable

from .terms import Term


def removable(terms: list[Term], hierarchy: bool) -> list[Term]:
    """Terms that may be dropped: with hierarchy, only those no other remaining term needs."""
    if not hierarchy:
        return list(terms)
    needed = {parent for t in terms for parent in t.parents()}
    return [t for t in terms if t not in needed]


def backward_reduce(
    terms: list[Term],
    p_values: Callable[[list[Term]], dict[Term, float]],
    alpha: float,
    hierarchy: bool = True,
) -> tuple[list[Term], list[dict]]:
    """Drop, one at a time, the removable term with the largest p-value while it exceeds alpha.

    ``p_values(terms)`` refits and returns each term's p-value. At least one term is kept.
    Returns the kept terms and the steps taken ({term, p_value} per removal, as term objects).
    """
    current = list(terms)
    steps: list[dict] = []
    while len(current) > 1:
        pv = p_values(current)
        candidates = [(pv[t], t) for t in removable(current, hierarchy) if pv.get(t) is not None]
        candidates = [(p, t) for p, t in candidates if p == p]  # drop NaN p-values
        if not candidates:
            break
        worst_p, worst = max(candidates, key=lambda pt: (pt[0], pt[1]))
        if worst_p <= alpha:
            break
        current.remove(worst)
        steps.append({"term": worst, "p_value": worst_p})
    return current, steps
