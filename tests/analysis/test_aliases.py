"""Alias structure of regular two-level fractions against published design tables.

Sources: Box, Hunter & Hunter, Statistics for Experimenters (2nd ed., 2005), ch. 6: the 2^(5-1)
fraction with generator E = ABCD (I = ABCDE, resolution V) and the 2^(7-4) resolution III
fraction with D = AB, E = AC, F = BC, G = ABC, whose main effects are each aliased with three
two-factor interactions (e.g. A with BD, CE, FG). The generators and alias patterns are as
recalled from memory of those tables; each also follows from the construction, and the code
finds them from the columns alone.
"""

from itertools import product

import numpy as np

from app.analysis.aliases import alias_structure
from app.analysis.design import describe_design


def _base(k):
    return np.array(list(product((-1.0, 1.0), repeat=k)))


def test_half_fraction_of_five_factors_is_resolution_five():
    base = _base(4)
    cube = np.column_stack([base, base.prod(axis=1)])  # E = ABCD
    got = alias_structure(cube, "ABCDE")
    assert got["fraction"] == "2^(5-1)" and got["runs"] == 16 and got["resolution"] == 5
    assert got["generators"] == [{"word": "A:B:C:D:E", "sign": 1}]
    assert got["relation"] == [{"word": "A:B:C:D:E", "sign": 1}]
    table = {row["effect"]: row["aliases"] for row in got["aliases"]}
    assert table["A"] == []  # aliased only with BCDE, beyond three-factor effects
    assert table["A:B"] == ["C:D:E"]
    assert describe_design(cube).resolution == 5  # the design recogniser agrees


def test_saturated_seven_factor_fraction_is_resolution_three():
    base = _base(3)
    a, b, c = base.T
    cube = np.column_stack([a, b, c, a * b, a * c, b * c, a * b * c])
    got = alias_structure(cube, "ABCDEFG")
    assert got["fraction"] == "2^(7-4)" and got["runs"] == 8 and got["resolution"] == 3
    assert len(got["relation"]) == 15  # 2^4 - 1 words besides I
    assert len(got["generators"]) == 4
    # The published generators are in the relation, as words I = ABD, ACE, BCF, ABCG.
    words = {w["word"] for w in got["relation"]}
    assert {"A:B:D", "A:C:E", "B:C:F", "A:B:C:G"} <= words
    table = {row["effect"]: row["aliases"] for row in got["aliases"]}
    assert [e for e in table["A"] if e.count(":") == 1] == ["B:D", "C:E", "F:G"]


def test_a_full_factorial_has_no_aliases_and_signs_follow_the_generator():
    assert alias_structure(_base(3), "ABC") is None
    base = _base(3)
    cube = np.column_stack([base, -base.prod(axis=1)])  # D = -ABC, the other half
    got = alias_structure(cube, ("Temp", "Time", "Cat", "Speed"))
    assert got["generators"] == [{"word": "Temp:Time:Cat:Speed", "sign": -1}]
    table = {row["effect"]: row["aliases"] for row in got["aliases"]}
    assert table["Temp:Time"] == ["Cat:Speed"]
