"""Regular two-level fractions 2^(k-p): the published generators, and generators given by name.

Words are bit masks over the factors (bit i = factor i). A fraction is built from a full
factorial in its k - p base factors (standard order, first factor changing fastest); each
generated factor's column is the signed product of its word's base columns.
"""

from __future__ import annotations

from itertools import product

import numpy as np

from .factors import PlanError

# Minimum aberration 2^(k-p) fractions of highest resolution for each run count, as printed in
# Montgomery, Design and Analysis of Experiments (8th ed.), Table 8.14 "Selected 2^(k-p)
# fractional factorial designs" (after Box & Hunter 1961 and the minimum aberration listing of
# Chen, Sun & Wu 1993); the 8-, 16- and 32-run entries agree with Box, Hunter & Hunter,
# Statistics for Experimenters (2nd ed.), Table 6.22. Entered from memory of those tables, so
# every entry is checked by tests/analysis/test_plans.py: its resolution is computed from the
# columns, and for the smaller cases no other choice of generators has a better word-length
# pattern. Letters follow the tables, which skip I: factor 9 is J, 10 is K, 11 is L.
TABLE_LETTERS = "ABCDEFGHJKL"
PUBLISHED: dict[tuple[int, int], tuple[int, tuple[str, ...]]] = {
    # (factors, runs): (resolution, generators "generated = word")
    (3, 4): (3, ("C=AB",)),
    (4, 8): (4, ("D=ABC",)),
    (5, 8): (3, ("D=AB", "E=AC")),
    (5, 16): (5, ("E=ABCD",)),
    (6, 8): (3, ("D=AB", "E=AC", "F=BC")),
    (6, 16): (4, ("E=ABC", "F=BCD")),
    (6, 32): (6, ("F=ABCDE",)),
    (7, 8): (3, ("D=AB", "E=AC", "F=BC", "G=ABC")),
    (7, 16): (4, ("E=ABC", "F=BCD", "G=ACD")),
    (7, 32): (4, ("F=ABCD", "G=ABDE")),
    (7, 64): (7, ("G=ABCDEF",)),
    (8, 16): (4, ("E=BCD", "F=ACD", "G=ABC", "H=ABD")),
    (8, 32): (4, ("F=ABC", "G=ABD", "H=BCDE")),
    (8, 64): (5, ("G=ABCD", "H=ABEF")),
    (9, 16): (3, ("E=ABC", "F=BCD", "G=ACD", "H=ABD", "J=ABCD")),
    (9, 32): (4, ("F=BCDE", "G=ACDE", "H=ABDE", "J=ABCE")),
    (9, 64): (4, ("G=ABCD", "H=ACEF", "J=CDEF")),
    (9, 128): (6, ("H=ACDFG", "J=BCEFG")),
    (10, 16): (3, ("E=ABC", "F=BCD", "G=ACD", "H=ABD", "J=ABCD", "K=AB")),
    (10, 32): (4, ("F=ABCD", "G=ABCE", "H=ABDE", "J=ACDE", "K=BCDE")),
    (10, 64): (4, ("G=BCDF", "H=ACDF", "J=ABDE", "K=ABCE")),
    (10, 128): (5, ("H=ABCG", "J=BCDE", "K=ACDF")),
    (11, 16): (3, ("E=ABC", "F=BCD", "G=ACD", "H=ABD", "J=ABCD", "K=AB", "L=AC")),
    (11, 32): (4, ("F=ABC", "G=BCD", "H=CDE", "J=ACD", "K=ADE", "L=BDE")),
    (11, 64): (4, ("G=CDE", "H=ABCD", "J=ABF", "K=BDEF", "L=ADEF")),
    (11, 128): (5, ("H=ABCG", "J=BCDE", "K=ACDF", "L=ABCDEFG")),
}
MAX_FRACTION_FACTORS = 12  # aliases.alias_structure enumerates words up to 12 factors


def _mask(letters: str) -> int:
    return sum(1 << TABLE_LETTERS.index(ch) for ch in letters)


def published(k: int, runs: int) -> tuple[int, list[tuple[int, int, int]]]:
    """(resolution, [(generated factor, base word mask, sign)]) from the table."""
    resolution, texts = PUBLISHED[(k, runs)]
    gens = []
    for text in texts:
        left, right = text.split("=")
        gens.append((TABLE_LETTERS.index(left), _mask(right), 1))
    return resolution, gens


def run_counts(k: int) -> list[int]:
    return sorted(runs for (kk, runs) in PUBLISHED if kk == k)


def default_runs(k: int) -> int:
    """The fewest runs with resolution IV or better (main effects clear of two-factor
    interactions), or the largest fraction listed when none reaches IV."""
    listed = run_counts(k)
    good = [r for r in listed if PUBLISHED[(k, r)][0] >= 4]
    return good[0] if good else listed[-1]


def parse_generators(texts: list[str], names: list[str]) -> list[tuple[int, int, int]]:
    """``["E = A:B:C:D", "F = -A:B:C"]`` by factor name → [(generated, base word mask, sign)].

    Each left side is a factor made by the fraction; every right-hand factor is a base factor
    (not generated), with at least two of them so no main effect is aliased with another.
    """
    index = {name: i for i, name in enumerate(names)}
    parsed = []
    for n, text in enumerate(texts):
        field = f"generators[{n}]"
        if not isinstance(text, str) or text.count("=") != 1:
            raise PlanError("write a generator as 'E = A:B:C:D' with factor names", field)
        left, right = (part.strip() for part in text.split("="))
        sign = 1
        if right.startswith("-"):
            sign, right = -1, right[1:].strip()
        parts = [p.strip() for p in right.split(":")]
        unknown = [p for p in [left, *parts] if p not in index]
        if unknown:
            raise PlanError(f"'{unknown[0]}' is not a factor name", field)
        if len(set(parts)) != len(parts) or len(parts) < 2:
            raise PlanError("the right side needs two or more different factors", field)
        parsed.append((index[left], sum(1 << index[p] for p in parts), sign))
    generated = {g for g, _, _ in parsed}
    if len(generated) != len(parsed):
        raise PlanError("a factor is generated twice", "generators")
    for n, (g, word, _) in enumerate(parsed):
        if word & sum(1 << i for i in generated):
            raise PlanError(f"'{names[g]}' must be made from base factors only, not from "
                            "other generated factors", f"generators[{n}]")
    words = [word for _, word, _ in parsed]
    if len(set(words)) != len(words):
        raise PlanError("two generated factors share one column", "generators")
    return parsed


def cube_points(k: int, gens: list[tuple[int, int, int]]) -> np.ndarray:
    """The 2^(k-p) cube points in standard order of the base factors."""
    generated = {g for g, _, _ in gens}
    base = [i for i in range(k) if i not in generated]
    full = np.array([row[::-1] for row in product((-1.0, 1.0), repeat=len(base))])
    out = np.empty((len(full), k))
    out[:, base] = full
    for g, word, sign in gens:
        cols = [i for i in range(k) if word >> i & 1]
        out[:, g] = sign * np.prod(out[:, cols], axis=1)
    return out


def generator_text(gen: tuple[int, int, int], names: list[str]) -> str:
    g, word, sign = gen
    right = ":".join(names[i] for i in range(len(names)) if word >> i & 1)
    return f"{names[g]} = {'-' if sign < 0 else ''}{right}"
