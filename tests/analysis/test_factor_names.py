"""Factor names that would make term names ambiguous are refused, and term powers are bounded.

Reference: the naming rule of DESIGN.md ("interactions joined with ':', squares as 'A^2'"): a
factor named "A:B" beside factors A and B would give two coefficients named "A:B".
"""

import re

import numpy as np
import pandas as pd
import pytest
from helpers import full_factorial

from app.analysis import AnalysisError, Factor, FitSpec, analyse
from app.analysis.terms import MAX_POWER, parse_term, resolve_terms


@pytest.mark.parametrize("bad", ["A:B", "Temp^2", "Intercept", "intercept", " INTERCEPT "])
def test_ambiguous_factor_names_are_refused_naming_the_factor(bad):
    with pytest.raises(AnalysisError, match=re.escape(f"Factor '{bad}'")):
        resolve_terms("interaction", None, ("A", "B", bad), hierarchy=True)


def test_factor_named_like_an_interaction_is_not_fitted_silently():
    # Before the fix: coefficients "A:B" (the interaction) and "A:B" (the factor), side by side.
    x = full_factorial(3)
    frame = pd.DataFrame({"A": x[:, 0], "B": x[:, 1], "A:B": x[:, 2], "Y": np.arange(8.0)},
                         index=pd.RangeIndex(1, 9))
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B"), Factor("A:B")),
                   model="interaction")
    with pytest.raises(AnalysisError, match="Factor 'A:B': a factor name may not contain ':'"):
        analyse(frame, spec)


@pytest.mark.parametrize("term", ["Catalyst^999999", "Catalyst^11", "Catalyst^6:Catalyst^5",
                                  "Catalyst^" + "9" * 5000])
def test_powers_above_the_cap_are_refused_naming_the_term(term):
    # Before the fix Catalyst^999999 was accepted and the hierarchy then added every lower power
    # (24 s of CPU); a 5000-digit exponent raised a bare ValueError from int().
    with pytest.raises(AnalysisError, match=r"Term 'Catalyst\^.*': the power of 'Catalyst' is "
                       f"above {MAX_POWER}"):
        resolve_terms(None, (term,), ("Catalyst", "Time"), hierarchy=True)


def test_power_at_the_cap_is_accepted_and_odd_exponents_are_not_factor_names():
    assert parse_term(f"Catalyst^{MAX_POWER}", ("Catalyst",)).degree == MAX_POWER
    # a superscript digit passes str.isdigit() but not int(): before the fix a bare ValueError
    with pytest.raises(AnalysisError, match="is not a factor name"):
        parse_term("Catalyst^\u00b2", ("Catalyst",))
