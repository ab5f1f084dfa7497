"""The fitted equation in coded and in natural units (the factors' own units).

Each coded term prod_i x_i^p_i with x_i = (v_i - c_i) / h_i is expanded into monomials of the
natural values v_i and like monomials are collected. Block effects are left out: the equation is
the average over blocks. Verified by reproducing the NIST StRD certified polynomial coefficients
(Norris, Pontius, Wampler, Filip) from fits made in coded units
(tests/analysis/test_reference_nist.py).
"""

from __future__ import annotations

from math import comb

from .coding import centre_and_half_range
from .spec import Factor
from .terms import Term


def _fmt(v: float) -> str:
    return f"{v:.6g}"


def _monomial_name(exponents: tuple[int, ...], names: tuple[str, ...]) -> str:
    parts = [n if p == 1 else f"{n}^{p}" for n, p in zip(names, exponents, strict=True) if p]
    return ":".join(parts) if parts else "Intercept"


def _render(lhs: str, pairs: list[tuple[str, float]]) -> str:
    text = f"{lhs} = "
    for i, (name, coef) in enumerate(pairs):
        sign = "-" if coef < 0 else "+"
        mag = _fmt(abs(coef))
        piece = mag if name == "Intercept" else f"{mag}·{name}"
        if i == 0:
            text += ("-" if coef < 0 else "") + piece
        else:
            text += f" {sign} {piece}"
    return text


def _column_pieces(term: Term, factors: tuple[Factor, ...]) -> list[tuple[str, Term | None]]:
    """Each model column of ``term`` as (its categorical part's name, its continuous part),
    in the column order of :meth:`Term.columns`."""
    labels = [""]
    continuous = []
    for i, p in term.powers:
        f = factors[i]
        if f.categorical:
            labels = [f"{a}:{f.name}[{lv}]" if a else f"{f.name}[{lv}]"
                      for a in labels for lv in f.levels[:-1]]
        else:
            continuous.append((i, p))
    rest = Term(tuple(continuous)) if continuous else None
    return [(label, rest) for label in labels]


def actual_polynomial(
    intercept: float, terms: list[Term], coefs: list[float], factors: tuple[Factor, ...]
) -> dict[tuple[str, tuple[int, ...]], float]:
    """Coefficients in natural units, keyed by (categorical column name or "", exponents of
    the continuous factors). ``coefs`` holds one value per model column of the terms."""
    k = len(factors)
    ch = [centre_and_half_range(f) for f in factors]
    poly: dict[tuple[str, tuple[int, ...]], float] = {("", (0,) * k): intercept}
    flat = iter(coefs)
    for term in terms:
        for label, rest in _column_pieces(term, factors):
            current: dict[tuple[int, ...], float] = {(0,) * k: next(flat)}
            for i, p in rest.powers if rest else ():
                c, h = ch[i]
                nxt: dict[tuple[int, ...], float] = {}
                for exps, val in current.items():
                    # ((v - c) / h)^p = sum_j C(p, j) v^j (-c)^(p-j) / h^p
                    for j in range(p + 1):
                        e = list(exps)
                        e[i] += j
                        key = tuple(e)
                        nxt[key] = nxt.get(key, 0.0) + val * comb(p, j) * (-c) ** (p - j) / h**p
                current = nxt
            for exps, val in current.items():
                poly[(label, exps)] = poly.get((label, exps), 0.0) + val
    return poly


def _natural_name(label: str, exps: tuple[int, ...], names: tuple[str, ...]) -> str:
    monomial = _monomial_name(exps, names)
    if not label:
        return monomial
    return label if monomial == "Intercept" else f"{label}:{monomial}"


def _levels_note(factors: tuple[Factor, ...]) -> str:
    """How a categorical factor's levels enter the equation (sum-to-zero columns)."""
    notes = []
    for f in factors:
        if f.categorical:
            named = ", ".join(f"{f.name}[{lv}]" for lv in f.levels[:-1])
            notes.append(f"{named} are 1 at that level of {f.name}, -1 at its last level "
                         f"'{f.levels[-1]}' and 0 otherwise (so the last level's effect is "
                         "minus the sum of the others)")
    return "; " + "; ".join(notes) if notes else ""


def equations(
    response_label: str,
    intercept: float,
    terms: list[Term],
    coefs: list[float],
    factors: tuple[Factor, ...],
) -> dict:
    """``{"coded": str, "actual": str, "actual_terms": [{term, coefficient}], "note": str}``.

    ``coefs`` holds one coefficient per model column of ``terms`` (a categorical factor's term
    has one per level but the last).
    """
    names = tuple(f.name for f in factors)
    levels = {i: f.levels for i, f in enumerate(factors) if f.categorical}
    column_names = [n for t in terms for n in t.column_names(names, levels)]
    coded_pairs = [("Intercept", intercept)] + list(zip(column_names, coefs, strict=True))
    poly = actual_polynomial(intercept, terms, coefs, factors)
    rank = {label: i for i, label in enumerate(dict.fromkeys(label for label, _ in poly))}
    ordered = sorted(poly.items(), key=lambda kv: (sum(kv[0][1]) + (kv[0][0] != ""),
                                                   rank[kv[0][0]], tuple(-e for e in kv[0][1])))
    actual_pairs = [(_natural_name(label, e, names), v) for (label, e), v in ordered]
    return {
        "coded": _render(response_label, coded_pairs),
        "actual": _render(response_label, actual_pairs),
        "actual_terms": [{"term": n, "coefficient": v} for n, v in actual_pairs],
        "coded_terms": [{"term": n, "coefficient": v} for n, v in coded_pairs],
        "note": "block effects are averaged out; "
                "factors in coded units are x = (value - centre) / half-range"
                + _levels_note(factors),
    }
