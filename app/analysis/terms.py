"""Model terms: named models, explicit term lists, hierarchy and the coded model matrix.

A term is a product of factor powers, e.g. ``A``, ``A:B``, ``A^2``, ``A:B:C``. Term names are
built from the factor names as given, so names such as ``C``, ``I`` or ``Feed rate`` are safe:
nothing here is ever handed to a formula parser. Names containing ':' or '^', or named
"Intercept", are refused (at upload, and again here): they would make two coefficients share a
name, or a term text mean a different term.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from .coding import effect_columns
from .spec import AnalysisError

# Term names join factors with ':' and powers with '^', so factor names may not contain them.
RESERVED_CHARACTERS = (":", "^")
# The highest power of one factor in a term. Unbounded, "A^999999" made the hierarchy add every
# lower power (minutes of CPU). 10 is the highest degree the fit is verified for (NIST StRD
# Filip); a power the factor's levels cannot support (power >= number of levels) is refused
# later as aliased with the lower powers, naming the term.
MAX_POWER = 10


@dataclass(frozen=True, order=True)
class Term:
    """A monomial in the coded factors: ``powers`` holds (factor index, exponent) pairs."""

    powers: tuple[tuple[int, int], ...]

    @property
    def degree(self) -> int:
        return sum(p for _, p in self.powers)

    @property
    def factors(self) -> tuple[int, ...]:
        return tuple(i for i, _ in self.powers)

    def name(self, factor_names: tuple[str, ...]) -> str:
        parts = []
        for i, p in self.powers:
            parts.append(factor_names[i] if p == 1 else f"{factor_names[i]}^{p}")
        return ":".join(parts)

    def is_two_level_product(self) -> bool:
        """True for main effects and interactions (every exponent 1)."""
        return all(p == 1 for _, p in self.powers)

    def parents(self) -> list[Term]:
        """Terms directly below this one: drop one factor, or lower one exponent by one."""
        out = []
        for k, (i, p) in enumerate(self.powers):
            rest = list(self.powers)
            if p == 1:
                del rest[k]
            else:
                rest[k] = (i, p - 1)
            if rest:
                out.append(Term(tuple(rest)))
        return out

    def columns(self, coded: np.ndarray, n_levels: Mapping[int, int] | None = None) -> np.ndarray:
        """The term's model columns: one for continuous factors; a categorical factor (index
        in ``n_levels``, its coded column holding level numbers) multiplies in its L - 1
        sum-to-zero columns, so A:B of two categorical factors has (L_A - 1)(L_B - 1)."""
        n_levels = n_levels or {}
        cols = np.ones((coded.shape[0], 1))
        for i, p in self.powers:
            if i in n_levels:
                effect = effect_columns(coded[:, i], n_levels[i])
                cols = (cols[:, :, None] * effect[:, None, :]).reshape(coded.shape[0], -1)
            else:
                cols = cols * coded[:, i:i + 1] ** p
        return cols

    def column_names(self, factor_names: tuple[str, ...],
                     levels: Mapping[int, tuple[str, ...]] | None = None) -> list[str]:
        """Names of :meth:`columns` in the same order: ``Supplier[B]``, ``Supplier[B]:Temp``."""
        levels = levels or {}
        names = [""]
        for i, p in self.powers:
            if i in levels:
                parts = [f"{factor_names[i]}[{lv}]" for lv in levels[i][:-1]]
            else:
                parts = [factor_names[i] if p == 1 else f"{factor_names[i]}^{p}"]
            names = [f"{a}:{b}" if a else b for a in names for b in parts]
        return names


def sort_key(term: Term) -> tuple:
    """Main effects first, then interactions, then powers; within a kind, factor order."""
    pure_power = len(term.powers) == 1 and term.powers[0][1] > 1
    return (term.degree if not pure_power else term.degree + 0.5, term.powers)


def named_model(model: str, k: int, categorical: frozenset[int] = frozenset()) -> list[Term]:
    """The terms of a named model for ``k`` factors.

    ``linear``: main effects; ``interaction``: plus two-factor interactions; ``quadratic``: plus
    squares of the continuous factors (a categorical factor's main effect already fits each of
    its levels); ``full``: every interaction up to the k-factor one (two-level designs).
    """
    mains = [Term(((i, 1),)) for i in range(k)]
    twos = [Term(((i, 1), (j, 1))) for i, j in combinations(range(k), 2)]
    if model == "linear":
        return mains
    if model == "interaction":
        return mains + twos
    if model == "quadratic":
        return mains + twos + [Term(((i, 2),)) for i in range(k) if i not in categorical]
    if model == "full":
        out = []
        for order in range(1, k + 1):
            out += [Term(tuple((i, 1) for i in c)) for c in combinations(range(k), order)]
        return out
    raise AnalysisError(f"Unknown model '{model}'")


def check_factor_names(factor_names: tuple[str, ...]) -> None:
    """Refuse factor names that would make term names ambiguous.

    Term names join factors with ':' and powers with '^', and the first coefficient is the
    "Intercept": a factor named "A:B" would share its name with the interaction of A and B.
    """
    for name in factor_names:
        problem = factor_name_problem(name)
        if problem:
            raise AnalysisError(f"Factor '{name}': {problem}")


def factor_name_problem(name: str) -> str | None:
    """Why ``name`` cannot be a factor name, or None (shared with the upload check)."""
    reserved = [ch for ch in RESERVED_CHARACTERS if ch in name]
    if reserved:
        return (f"a factor name may not contain {' or '.join(repr(ch) for ch in reserved)}, "
                "which term names use for interactions and powers; rename the column")
    if name.strip().lower() == "intercept":
        return "'Intercept' names the model's constant term; rename the column"
    return None


def _parse_factor_power(part: str, lookup: dict[str, int], term_text: str) -> tuple[int, int]:
    if part in lookup:
        return lookup[part], 1
    if "^" in part:
        base, _, exponent = part.rpartition("^")
        if base in lookup and exponent.isascii() and exponent.isdigit():
            digits = exponent.lstrip("0")
            # a long digit string is above any cap (and int() refuses more than 4300 digits)
            power = int(digits or "0") if len(digits) <= 4 else MAX_POWER + 1
            if power >= 1:
                return lookup[base], power
    raise AnalysisError(
        f"Term '{term_text}': '{part}' is not a factor name (factors: {', '.join(lookup)})"
    )


def parse_term(text: str, factor_names: tuple[str, ...]) -> Term:
    """Parse one term such as ``A``, ``A:B`` or ``A^2`` against the factor names.

    A factor's total power in a term is at most ``MAX_POWER``.
    """
    lookup = {name: i for i, name in enumerate(factor_names)}
    text = text.strip()
    if not text:
        raise AnalysisError("An empty term was given")
    exponents: dict[int, int] = {}
    for part in text.split(":"):
        i, p = _parse_factor_power(part.strip(), lookup, text)
        exponents[i] = exponents.get(i, 0) + p
        if exponents[i] > MAX_POWER:
            raise AnalysisError(
                f"Term '{text}': the power of '{factor_names[i]}' is above {MAX_POWER}, the "
                "highest this analysis fits (a power needs at least power + 1 levels of the "
                "factor)")
    return Term(tuple(sorted(exponents.items())))


def with_hierarchy(terms: list[Term]) -> list[Term]:
    """Add every parent a term needs (A:B needs A and B; A^2 needs A)."""
    wanted = set(terms)
    stack = list(terms)
    while stack:
        for parent in stack.pop().parents():
            if parent not in wanted:
                wanted.add(parent)
                stack.append(parent)
    return sorted(wanted, key=sort_key)


def resolve_terms(
    model: str | None,
    terms: tuple[str, ...] | None,
    factor_names: tuple[str, ...],
    hierarchy: bool,
    categorical: frozenset[int] = frozenset(),
) -> list[Term]:
    """Turn a named model or explicit term list into ordered, de-duplicated terms.

    ``categorical`` holds the indices of categorical factors, which may enter a term only to
    the first power.
    """
    check_factor_names(factor_names)
    if terms is not None:
        parsed = [parse_term(t, factor_names) for t in terms]
    else:
        parsed = named_model(model or "linear", len(factor_names), categorical)
    for term, text in zip(parsed, terms or (), strict=False):
        powered = [factor_names[i] for i, p in term.powers if i in categorical and p > 1]
        if powered:
            raise AnalysisError(
                f"Term '{text.strip()}': '{powered[0]}' is a categorical factor, so it has no "
                "square or higher power (its levels are names with no spacing); its main "
                "effect already fits every level separately")
    unique = sorted(set(parsed), key=sort_key)
    return with_hierarchy(unique) if hierarchy else unique


def is_hierarchical(terms: list[Term]) -> bool:
    have = set(terms)
    return all(parent in have for t in terms for parent in t.parents())


def block_columns(blocks: np.ndarray) -> tuple[np.ndarray, list[str], list[str]]:
    """Sum-to-zero (effect) columns for a block factor.

    Returns the n x (b-1) matrix, the column names ``Block[level]`` and all levels sorted. Effect
    coding makes a zero block row the average over blocks, which is what predictions use.
    """
    levels = sorted({str(b) for b in blocks})
    if len(levels) < 2:
        return np.zeros((len(blocks), 0)), [], levels
    numbers = np.searchsorted(levels, np.asarray(blocks, dtype=str)) + 1
    cols = effect_columns(numbers, len(levels))
    return cols, [f"Block[{lv}]" for lv in levels[:-1]], levels


def model_matrix(coded: np.ndarray, terms: list[Term], block_cols: np.ndarray | None = None,
                 n_levels: Mapping[int, int] | None = None):
    """Intercept, block columns, then each term's columns, in coded units (``n_levels``: the
    number of levels of each categorical factor, by factor index)."""
    pieces = [np.ones((coded.shape[0], 1))]
    if block_cols is not None and block_cols.shape[1]:
        pieces.append(block_cols)
    pieces.extend(t.columns(coded, n_levels) for t in terms)
    return np.hstack(pieces)
