"""Blocks of a two-level design: which interactions are confounded with blocks.

Block effects are words (bit masks over the factors). With b block words, the 2^b blocks are
told apart by the signs of the words' products; the words and all their products are the
effects confounded with blocks.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np

from .factors import PlanError

# Published blocking of the full 2^k factorial: Montgomery, Design and Analysis of Experiments
# (8th ed.), Table 7.8 "Suggested blocking arrangements for the 2^k factorial design" (after Box,
# Hunter & Hunter). Entered from memory of that table; tests/analysis/test_plans.py checks that
# each arrangement is as good as any other (the effects confounded with blocks are of the
# highest order possible). Only arrangements that keep every main effect clear are listed.
FULL_FACTORIAL_BLOCKS: dict[tuple[int, int], tuple[str, ...]] = {
    (2, 2): ("AB",),
    (3, 2): ("ABC",), (3, 4): ("AB", "AC"),
    (4, 2): ("ABCD",), (4, 4): ("ABC", "ACD"), (4, 8): ("AB", "BC", "CD"),
    (5, 2): ("ABCDE",), (5, 4): ("ABC", "CDE"), (5, 8): ("ABE", "BCE", "CDE"),
    (6, 2): ("ABCDEF",), (6, 4): ("ABCF", "CDEF"), (6, 8): ("ABEF", "ABCD", "ACE"),
    (7, 2): ("ABCDEFG",), (7, 4): ("ABCFG", "CDEFG"), (7, 8): ("ABC", "DEF", "AFG"),
}
MAX_SEARCH_BLOCK_WORDS = 2  # 2 or 4 blocks for a fraction, found by search


def span(words: list[int]) -> list[int]:
    """Every non-empty product of the words."""
    out = []
    for r in range(1, len(words) + 1):
        for combo in combinations(words, r):
            x = 0
            for w in combo:
                x ^= w
            out.append(x)
    return out


def _order(word: int, relation: list[int]) -> int:
    """The order of the lowest effect in the word's alias set."""
    return min(bin(word ^ r).count("1") for r in [0, *relation])


def searched_block_words(k: int, base: list[int], relation: list[int], n_words: int) -> list[int]:
    """Block words for a fraction: of all choices among the fraction's columns, the one whose
    confounded effects are of the highest order (lowest orders compared first)."""
    candidates = [sum(1 << base[i] for i in range(len(base)) if m >> i & 1)
                  for m in range(1, 2 ** len(base))]
    best, best_score = None, None
    for combo in combinations(candidates, n_words):
        group = span(list(combo))
        if 0 in group:
            continue
        score = sorted(_order(w, relation) for w in group)
        if best_score is None or score > best_score:
            best, best_score = list(combo), score
    return best or []


def block_words(k: int, blocks: int, *, base: list[int], relation: list[int]) -> list[int]:
    """The block words for ``blocks`` blocks (a power of two) of a full factorial
    (``relation`` empty) or a fraction; PlanError when a main effect would be confounded."""
    n_words = blocks.bit_length() - 1
    if blocks < 2 or 2 ** n_words != blocks:
        raise PlanError("a two-level design takes 2, 4 or 8 blocks", "blocks")
    if not relation:
        letters = FULL_FACTORIAL_BLOCKS.get((k, blocks))
        if letters is None:
            raise PlanError(f"no published arrangement of {k} factors in {blocks} blocks keeps "
                            "every main effect clear of blocks", "blocks")
        return [sum(1 << "ABCDEFG".index(ch) for ch in word) for word in letters]
    if n_words > MAX_SEARCH_BLOCK_WORDS:
        raise PlanError("a fraction is split into 2 or 4 blocks here", "blocks")
    words = searched_block_words(k, base, relation, n_words)
    if not words or min(_order(w, relation) for w in span(words)) < 2:
        raise PlanError(f"{blocks} blocks would confound a main effect with blocks; use fewer "
                        "blocks or more runs", "blocks")
    return words


def block_numbers(cube: np.ndarray, words: list[int]) -> np.ndarray:
    """Block 1, 2, ... for each cube point, numbered in order of first appearance."""
    k = cube.shape[1]
    code = np.zeros(len(cube), dtype=int)
    for bit, word in enumerate(words):
        cols = [i for i in range(k) if word >> i & 1]
        code |= (np.prod(np.sign(cube[:, cols]), axis=1) < 0).astype(int) << bit
    _, first, inverse = np.unique(code, return_index=True, return_inverse=True)
    rank = np.argsort(np.argsort(first))
    return rank[inverse.ravel()] + 1


def confounded_with_blocks(words: list[int], relation: list[int], names: list[str]) -> list[str]:
    """Each effect confounded with blocks, written as its lowest-order alias."""
    out = []
    for w in span(words):
        low = min(([w ^ r for r in [0, *relation]]), key=lambda x: (bin(x).count("1"), x))
        out.append(":".join(names[i] for i in range(len(names)) if low >> i & 1))
    return sorted(out, key=lambda t: (t.count(":"), t))
