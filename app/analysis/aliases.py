"""Alias structure of a regular two-level fraction: its defining relation, a set of
generators, and which effects share a column.

A word (a set of factors) belongs to the defining relation when the product of its columns is
the same (+1 or -1) on every distinct cube point; the words form a group under symmetric
difference, and any basis of it is a set of generators. Two effects are aliased when their
symmetric difference is a word: their columns are equal up to sign over the fraction, so the
fit cannot tell them apart. Worked against the published 2^(5-1) fraction with I = ABCDE and
the 2^(7-4) resolution III fraction (Box, Hunter & Hunter, Statistics for Experimenters, 2nd ed.,
ch. 6) in tests/analysis/test_aliases.py.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np

MAX_FACTORS = 12  # 4,096 candidate words, each a product over the distinct points


def _name(word: frozenset[int], names: tuple[str, ...]) -> str:
    return ":".join(names[i] for i in sorted(word))


def defining_words(cube: np.ndarray) -> list[tuple[frozenset[int], int]]:
    """Every word of the defining relation with its sign, shortest first."""
    signs = np.sign(np.asarray(cube, dtype=float))
    k = signs.shape[1]
    words = []
    for order in range(1, k + 1):
        for combo in combinations(range(k), order):
            product = np.prod(signs[:, combo], axis=1)
            if np.all(product == product[0]):
                words.append((frozenset(combo), int(product[0])))
    return words


def generators(words: list[tuple[frozenset[int], int]]) -> list[tuple[frozenset[int], int]]:
    """A basis of the relation, taken shortest first (every word is a product of these)."""
    span: set[frozenset[int]] = {frozenset()}
    chosen = []
    for word, sign in words:
        if word in span:
            continue
        chosen.append((word, sign))
        span |= {w ^ word for w in span}
    return chosen


def alias_structure(cube: np.ndarray, names: tuple[str, ...] | list[str],
                    max_order: int = 2, alias_order: int = 3) -> dict | None:
    """The relation, generators, resolution and, for each effect up to ``max_order``, the
    effects up to ``alias_order`` that share its column. None for a full factorial or when
    there are too many factors to enumerate."""
    names = tuple(names)
    k = len(names)
    if k > MAX_FACTORS or k < 2:
        return None
    distinct = np.unique(np.sign(np.asarray(cube, dtype=float)), axis=0)
    words = defining_words(distinct)
    if not words:
        return None
    relation = {w for w, _ in words}
    table = []
    for order in range(1, max_order + 1):
        for combo in combinations(range(k), order):
            effect = frozenset(combo)
            partners = sorted((effect ^ w for w in relation if len(effect ^ w) <= alias_order),
                              key=lambda e: (len(e), sorted(e)))
            table.append({"effect": _name(effect, names),
                          "aliases": [_name(p, names) for p in partners if p]})
    return {"fraction": f"2^({k}-{len(generators(words))})",
            "runs": int(len(distinct)),
            "resolution": min(len(w) for w in relation),
            "generators": [{"word": _name(w, names), "sign": s}
                           for w, s in generators(words)],
            "relation": [{"word": _name(w, names), "sign": s} for w, s in words],
            "aliases": table}
