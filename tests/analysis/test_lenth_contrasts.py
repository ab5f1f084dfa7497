"""Lenth's PSE from every contrast of the two-level part of the design, whatever was fitted.

Sources:
- The filtration-rate 2^4 (pilot plant) example of Montgomery, Design and Analysis of
  Experiments, Example 6.2: the 16 responses in standard order and its effects, both recalled
  from memory; for that example the textbook gives Lenth's PSE = 2.625 (also recalled from
  memory). Lenth (1989), Technometrics 31(4), 469-473, for the method and its constants.
- An independent recomputation here with plain numpy: a Sylvester Hadamard matrix
  (scipy.linalg.hadamard) applied to the responses in standard order gives every contrast of a
  full 2^k, and Lenth's formulas written out by hand.
"""

import numpy as np
from helpers import frame_from, full_factorial
from numpy.testing import assert_allclose
from scipy import linalg, stats

from app.analysis import Factor, FitSpec, analyse
from app.analysis.design import describe_design
from app.analysis.effects import effects_and_lenth
from app.analysis.fit import least_squares
from app.analysis.terms import model_matrix, resolve_terms

NAMES = ("A", "B", "C", "D")
# Montgomery Example 6.2, filtration rate, standard order (recalled from memory)
FILTRATION = np.array([45, 71, 48, 65, 68, 60, 80, 65, 43, 100, 45, 104, 75, 86, 70, 96.0])
PSE_PUBLISHED = 2.625  # Montgomery's Lenth analysis of Example 6.2 (recalled from memory)


def _hand_lenth(effects: np.ndarray) -> tuple[float, float, float]:
    """Lenth (1989) written out: s0, PSE, ME, SME."""
    c = np.abs(effects)
    m = len(c)
    s0 = 1.5 * np.median(c)
    pse = 1.5 * np.median(c[c < 2.5 * s0])
    me = stats.t.ppf(0.975, m / 3) * pse
    sme = stats.t.ppf((1 + 0.95 ** (1 / m)) / 2, m / 3) * pse
    return pse, me, sme


def _fit(coded, y, names, terms):
    parsed = resolve_terms(None, terms, names, hierarchy=True)
    ls = least_squares(model_matrix(coded, parsed), y)
    return effects_and_lenth(describe_design(coded), parsed, ls, names, True, coded=coded)


def test_reduced_model_is_judged_against_every_contrast():
    # Before the fix PSE came from the five fitted effects only: PSE 24.9 and ME 131, so ME
    # exceeded every effect of the reduced model.
    coded = full_factorial(4)
    _, doc, half_normal = _fit(coded, FILTRATION, NAMES, ("A", "C", "D", "A:C", "A:D"))
    hadamard_effects = (linalg.hadamard(16).T @ FILTRATION / 8)[1:]
    assert_allclose(sorted(abs(e["effect"]) for e in doc["effects"]),
                    sorted(np.abs(hadamard_effects)), rtol=1e-12)
    pse, me, sme = _hand_lenth(hadamard_effects)
    assert_allclose(doc["pse"], PSE_PUBLISHED, rtol=1e-12)
    assert_allclose([doc["pse"], doc["me"], doc["sme"]], [pse, me, sme], rtol=1e-12)
    assert doc["m"] == 15 and doc["basis"] == "every contrast of the two-level part of the design"
    assert {e["term"] for e in doc["effects"] if e["in_model"]} == {"A", "C", "D", "A:C", "A:D"}
    assert sorted(doc["active"]) == ["A", "A:C", "A:D", "C", "D"]
    assert len(half_normal) == 15 and sum(p["in_model"] for p in half_normal) == 5


def test_fraction_contrasts_are_the_alias_sets():
    # 2^(4-1), D = ABC, with two centre points: seven alias-set contrasts, each the difference of
    # mean responses at + and - of its word (numpy below); centre runs take no part.
    base = full_factorial(3)
    half = np.column_stack([base, base.prod(axis=1)])
    coded = np.vstack([half, np.zeros((2, 4))])
    y = np.array([12.1, 15.3, 11.8, 16.9, 13.2, 15.1, 12.0, 17.4, 14.0, 14.2])  # made up
    _, doc, _ = _fit(coded, y, NAMES, ("A", "B", "C", "D", "C:D"))
    by_name = {e["term"]: e for e in doc["effects"]}
    # A:B and C:D are one contrast; the fitted name wins
    assert set(by_name) == {"A", "B", "C", "D", "C:D", "A:C", "A:D"}
    cube, yc = coded[:8], y[:8]
    for name, e in by_name.items():
        col = np.prod(cube[:, [NAMES.index(f) for f in name.split(":")]], axis=1)
        assert_allclose(e["effect"], yc[col > 0].mean() - yc[col < 0].mean(), rtol=1e-12)
    assert {n for n, e in by_name.items() if e["in_model"]} == {"A", "B", "C", "D", "C:D"}
    assert_allclose(doc["pse"], _hand_lenth(np.array([e["effect"] for e in doc["effects"]]))[0],
                    rtol=1e-12)


def test_effects_at_rounding_level_are_never_active():
    # y = 0.1 + 0.3 A + 0.7 B exactly: the five other contrasts are zero up to rounding. Before
    # the fix PSE and ME came from that rounding junk, and junk effects could pass ME.
    coded = full_factorial(3)
    y = 0.1 + 0.3 * coded[:, 0] + 0.7 * coded[:, 1]
    _, doc, _ = _fit(coded, y, NAMES[:3], ("A", "B", "C", "A:B", "A:C", "B:C", "A:B:C"))
    assert sorted(doc["active"]) == ["A", "B"]
    assert doc["pse"] == 0.0 and doc["me"] == 0.0
    assert doc["suggested_terms"] == ["A", "B"]


def test_engine_lenth_of_a_reduced_model_uses_every_contrast():
    frame = frame_from(full_factorial(4), FILTRATION)
    spec = FitSpec(response="Y", factors=tuple(Factor(n) for n in NAMES), model=None,
                   terms=("A", "C", "D", "A:C", "A:D"))
    result = analyse(frame, spec)
    assert_allclose(result.lenth["pse"], PSE_PUBLISHED, rtol=1e-12)
    assert result.lenth["m"] == 15
