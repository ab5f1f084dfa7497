"""Box–Cox profile numerics: small relative spread, units, offsets, the edge of the range, and
the shape of the result.

Independent references, computed here and not by the code under test:
- statsmodels OLS fitted per lambda to the plain transform y^lambda / lambda (log y at 0), with the
  Jacobian term (lambda - 1) sum log y added: the textbook profile log-likelihood of Box & Cox
  (1964), evaluated by a different route (SVD-based OLS on the unscaled response);
- the same formula in 50-digit decimal arithmetic (normal equations solved by elimination) for a
  response with a 1e6 offset, where double precision in the plain form would lose the answer.
"""

from decimal import Decimal, getcontext

import numpy as np
import pytest
import statsmodels.api as sm
from helpers import ccd, frame_from, full_factorial
from numpy.testing import assert_allclose
from scipy import optimize, stats

from app.analysis import Factor, FitSpec, analyse
from app.analysis.boxcox import boxcox_profile, profile_loglik
from app.analysis.fit import scaled_qr

# A 20-run CCD (alpha 1.682, 6 centre runs), linear model in A, B, C. The response is near 100
# and varies by a few units: 100 exp(0.03 A - 0.02 B + 0.01 C) plus noise of SD 0.05, rounded to
# two decimals (a log-scale truth, made up for this test).
NEAR_100 = np.array([98.03, 104.07, 94.21, 100.01, 99.97, 106.2, 96.14, 102.07, 105.14, 96.63,
                     101.67, 95.08, 103.3, 98.32, 99.94, 99.96, 99.97, 99.98, 100.02, 100.05])
CODED = ccd(3, 1.682, 6)
X = np.column_stack([np.ones(20), CODED])
Q = scaled_qr(X)[0]
HALF_CHI2 = stats.chi2.ppf(0.95, 1) / 2


def _reference_loglik(lam: float, y: np.ndarray, x: np.ndarray = X) -> float:
    """Box & Cox (1964) profile log-likelihood by statsmodels OLS on the unscaled transform."""
    z = np.log(y) if lam == 0 else y**lam / lam
    rss = sm.OLS(z, x).fit().ssr
    n = len(y)
    return -n / 2 * np.log(rss / n) + (lam - 1) * np.sum(np.log(y))


def _reference_estimate(y: np.ndarray) -> tuple[float, tuple[float, float]]:
    """lambda-hat and the 95 % profile interval from the statsmodels profile."""
    grid = np.linspace(-3, 3, 61)
    start = grid[int(np.argmax([_reference_loglik(g, y) for g in grid]))]
    opt = optimize.minimize_scalar(lambda v: -_reference_loglik(v, y),
                                   bounds=(start - 0.1, start + 0.1),
                                   method="bounded", options={"xatol": 1e-8})
    cut = -opt.fun - HALF_CHI2
    lo = optimize.brentq(lambda v: _reference_loglik(v, y) - cut, -3, opt.x)
    hi = optimize.brentq(lambda v: _reference_loglik(v, y) - cut, opt.x, 3)
    return float(opt.x), (lo, hi)


def test_profile_of_a_response_near_100_matches_statsmodels():
    # Before the fix: RSS as ||z||² - ||Q'z||² cancelled and this was refused as "the model fits
    # the response exactly". Reference: statsmodels OLS per lambda (module docstring).
    for lam in (-3.0, -1.0, -0.25, 0.0, 0.5, 1.0, 2.0, 3.0):
        assert_allclose(profile_loglik(lam, NEAR_100, Q), _reference_loglik(lam, NEAR_100),
                        rtol=1e-10)
    result = boxcox_profile(NEAR_100, Q)
    lam_ref, ci_ref = _reference_estimate(NEAR_100)
    assert_allclose(result.lambda_hat, lam_ref, atol=1e-4)
    assert_allclose(result.ci, ci_ref, atol=1e-4)
    assert result.ci[0] < 0 < result.ci[1] < 1  # the log-scale truth is supported, 1 is not
    assert result.suggestion == "log"
    assert result.reason is None and not result.at_edge


def test_units_do_not_change_lambda_hat_or_its_interval():
    # Box-Cox is unit invariant: L(lambda) for 1000 y differs from L for y by a constant.
    # Before the fix 1000 y was refused as an exact fit.
    base = boxcox_profile(NEAR_100, Q)
    for factor in (1000.0, 1e-3):
        scaled = boxcox_profile(factor * NEAR_100, Q)
        assert_allclose(scaled.lambda_hat, base.lambda_hat, atol=1e-6)
        assert_allclose(scaled.ci, base.ci, atol=1e-6)
        shift = scaled.profile[0][1] - base.profile[0][1]
        assert_allclose([v - shift for _, v in scaled.profile], [v for _, v in base.profile],
                        rtol=1e-9)


def test_narrow_spread_is_not_read_as_a_confident_lambda():
    # y near 100 varying by about a unit (quadratic model on the CCD): the profile is almost flat,
    # so the interval covers the range. Before the fix: lambda-hat -2.75 with CI [-2.749, -2.749].
    rng = np.random.default_rng(2)
    x = CODED
    y = 100 + 2 * x[:, 0] - 1.5 * x[:, 1] + x[:, 0] * x[:, 1] - x[:, 2] ** 2 + rng.normal(size=20)
    cols = [np.ones(20)] + [x[:, j] for j in range(3)]
    cols += [x[:, 0] * x[:, 1], x[:, 0] * x[:, 2], x[:, 1] * x[:, 2]]
    cols += [x[:, j] ** 2 for j in range(3)]
    xq = np.column_stack(cols)
    result = boxcox_profile(y, scaled_qr(xq)[0])
    for lam, value in result.profile[::5]:
        assert_allclose(value, _reference_loglik(lam, y, xq), rtol=1e-10)
    assert result.ci == (-3.0, 3.0) and result.ci_open == (True, True)
    assert result.suggestion == "none"


def _decimal_loglik(lam: float, y: np.ndarray, x: np.ndarray) -> float:
    """The Box & Cox profile log-likelihood in 50-digit decimal arithmetic (normal equations)."""
    getcontext().prec = 50
    yd = [Decimal(float(v)) for v in y]
    lam_d = Decimal(repr(lam))
    z = [v.ln() if lam == 0 else v ** lam_d / lam_d for v in yd]
    xd = [[Decimal(float(v)) for v in row] for row in x]
    p = len(xd[0])
    a = [[sum(r[i] * r[j] for r in xd) for j in range(p)] + [sum(r[i] * zi for r, zi in zip(xd, z))]
         for i in range(p)]
    for i in range(p):  # Gauss-Jordan elimination
        a[i] = [v / a[i][i] for v in a[i]]
        for k in range(p):
            if k != i:
                a[k] = [vk - a[k][i] * vi for vk, vi in zip(a[k], a[i])]
    b = [a[i][p] for i in range(p)]
    rss = sum((zi - sum(bj * rj for bj, rj in zip(b, r))) ** 2 for r, zi in zip(xd, z))
    n = Decimal(len(yd))
    value = -n / 2 * (rss / n).ln() + (lam_d - 1) * sum(v.ln() for v in yd)
    return float(value)


def test_large_offset_gets_a_finite_correct_profile():
    # 1e6 + y: before the fix every lambda was refused ("fits the response exactly").
    # Reference: 50-digit decimal evaluation of the textbook formula.
    y = 1e6 + NEAR_100
    for lam in (-3.0, -1.0, 0.0, 0.5, 1.0, 3.0):
        assert_allclose(profile_loglik(lam, y, Q), _decimal_loglik(lam, y, X), rtol=0, atol=1e-6)
    result = boxcox_profile(y, Q)
    assert all(np.isfinite(v) for _, v in result.profile)
    assert result.reason is None or "exactly" not in result.reason
    # an offset this large makes every power nearly linear: the data cannot choose lambda
    assert result.ci == (-3.0, 3.0) and result.suggestion == "none"


def test_lambda_at_the_edge_is_reported_not_suggested():
    # y^4 is additive here, so the likelihood still rises at lambda = 3. Reference: statsmodels
    # profile rising towards the edge. Before the fix lambda-hat 3.0 was reported as an estimate.
    x = full_factorial(3)
    x = np.vstack([x, x])
    rng = np.random.default_rng(5)
    y = (20 + 6 * x[:, 0] - 4 * x[:, 1] + 3 * x[:, 2] + 0.3 * rng.normal(size=16)) ** 0.25
    xm = np.column_stack([np.ones(16), x])
    assert (_reference_loglik(3.0, y, xm) > _reference_loglik(2.9, y, xm)
            > _reference_loglik(2.5, y, xm))
    result = boxcox_profile(y, scaled_qr(xm)[0])
    assert result.lambda_hat is None and result.at_edge
    assert "edge of the range searched, [-3, 3]" in result.reason
    assert "edge of the range searched, [-3, 3]" in result.message
    assert "try Box-Cox with lambda" not in result.message
    assert result.ci[1] == 3.0 and result.ci_open[1]


KEYS = {"lambda_hat", "ci", "ci_open", "at_edge", "lambda_range", "suggestion", "profile",
        "message", "reason"}


@pytest.mark.parametrize(("y", "q", "reason"), [
    (NEAR_100, Q, None),
    (NEAR_100 - 100.0, Q, "zero or negative"),
    (np.full(20, 7.0), Q, "every response value is the same"),
    (np.exp(0.1 * CODED[:, 0]), Q, "fits the transformed response exactly"),  # at lambda = 0
    (NEAR_100[:5], scaled_qr(X[:5])[0], "too few residual degrees of freedom"),
    (5 + CODED[:, 0] + 0.5 * CODED[:, 1], Q, "fits the transformed response exactly"),
])
def test_result_has_the_same_keys_whether_or_not_lambda_was_estimated(y, q, reason):
    doc = boxcox_profile(y, q).to_dict()
    assert set(doc) == KEYS
    if reason is None:
        return
    assert doc["lambda_hat"] is None and reason in doc["reason"]
    assert doc["reason"] in doc["message"]


def test_engine_boxcox_keys_do_not_depend_on_the_data():
    frame = frame_from(CODED, NEAR_100)
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B"), Factor("C")))
    good = analyse(frame, spec).to_dict()["boxcox"]
    bad = analyse(frame_from(CODED, NEAR_100 - 100.0), spec).to_dict()["boxcox"]
    assert set(good) == set(bad) == KEYS
    assert bad["lambda_hat"] is None and "zero or negative" in bad["reason"]


def test_engine_estimates_lambda_for_a_response_in_other_units():
    # end to end: before the fix 1000 y was refused, so transform="boxcox" raised
    frame = frame_from(CODED, 1000 * NEAR_100)
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B"), Factor("C")),
                   transform="boxcox")
    result = analyse(frame, spec)
    lam_ref, _ = _reference_estimate(NEAR_100)
    assert_allclose(result.boxcox["lambda_hat"], lam_ref, atol=1e-4)
    assert result.transform["lambda"] == round(result.boxcox["lambda_hat"], 2)
