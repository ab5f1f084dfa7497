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


def actual_polynomial(
    intercept: float, terms: list[Term], coefs: list[float], factors: tuple[Factor, ...]
) -> dict[tuple[int, ...], float]:
    """Coefficients of monomials in natural units, keyed by exponent tuples."""
    k = len(factors)
    ch = [centre_and_half_range(f) for f in factors]
    poly: dict[tuple[int, ...], float] = {(0,) * k: intercept}
    for term, b in zip(terms, coefs, strict=True):
        current: dict[tuple[int, ...], float] = {(0,) * k: b}
        for i, p in term.powers:
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
            poly[exps] = poly.get(exps, 0.0) + val
    return poly


def equations(
    response_label: str,
    intercept: float,
    terms: list[Term],
    coefs: list[float],
    factors: tuple[Factor, ...],
) -> dict:
    """``{"coded": str, "actual": str, "actual_terms": [{term, coefficient}], "note": str}``."""
    names = tuple(f.name for f in factors)
    coded_pairs = [("Intercept", intercept)] + [
        (t.name(names), b) for t, b in zip(terms, coefs, strict=True)]
    poly = actual_polynomial(intercept, terms, coefs, factors)
    ordered = sorted(poly.items(), key=lambda kv: (sum(kv[0]), tuple(-e for e in kv[0])))
    actual_pairs = [(_monomial_name(e, names), v) for e, v in ordered]
    return {
        "coded": _render(response_label, coded_pairs),
        "actual": _render(response_label, actual_pairs),
        "actual_terms": [{"term": n, "coefficient": v} for n, v in actual_pairs],
        "coded_terms": [{"term": n, "coefficient": v} for n, v in coded_pairs],
        "note": "block effects are averaged out; "
                "factors in coded units are x = (value - centre) / half-range",
    }
