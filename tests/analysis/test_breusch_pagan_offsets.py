"""Breusch–Pagan on fitted values must not depend on the response's offset or unit.

Reference: statsmodels.stats.diagnostic.het_breuschpagan (Koenker's studentized LM, its default
robust=True) on the well-conditioned response, computed in the test. The statistic is invariant
to an offset or a scale of the fitted values and to a scale of the residuals, so the shifted and
scaled responses must give the same LM, df and p.
"""

import numpy as np
import pytest
from helpers import ccd
from numpy.testing import assert_allclose
from statsmodels.stats.diagnostic import het_breuschpagan

from app.analysis.checks.variance import breusch_pagan
from app.analysis.fit import least_squares

CODED = ccd(3, 1.682, 6)
X = np.column_stack([np.ones(20), CODED])


def _response() -> np.ndarray:
    # spread grows with A (a megaphone), made up for this test
    rng = np.random.default_rng(11)
    return 50 + 3 * CODED[:, 0] - 2 * CODED[:, 1] + (1 + 0.6 * CODED[:, 0]) * rng.normal(size=20)


@pytest.mark.parametrize(("offset", "scale"), [(0.0, 1.0), (1e9, 1.0), (0.0, 1e-9), (1e8, 1.0)])
def test_lm_and_p_agree_with_statsmodels_whatever_the_offset_or_unit(offset, scale):
    y = _response()
    plain = least_squares(X, y)
    lm_ref, p_ref, _, _ = het_breuschpagan(plain.residuals,
                                           np.column_stack([np.ones(20), plain.fitted]))
    fit = least_squares(X, offset + scale * y)
    bp = breusch_pagan(fit.residuals, fit.fitted)
    lm, p, (df,) = bp.statistic, bp.pvalue, bp.df
    # before the fix: at offsets of 1e8 and more, rank([1, fitted]) came out 1, so df = 0 and p = 0
    assert df == 1
    assert_allclose(lm, lm_ref, rtol=1e-6)
    assert_allclose(p, p_ref, rtol=1e-6)


def test_constant_regressor_carries_no_degree_of_freedom():
    # a regressor constant up to rounding adds nothing: df 0, LM 0 and no p (never a spurious 0)
    y = _response()
    fit = least_squares(X, y)
    bp = breusch_pagan(fit.residuals, 1e9 * (1 + 1e-15 * (np.arange(20) % 2)))
    assert bp.df == (0,) and bp.statistic == 0.0 and bp.pvalue is None
