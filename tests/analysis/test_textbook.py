"""Textbook worked examples, recalled from memory (marked so beside each value)."""

import numpy as np
import pandas as pd
from helpers import frame_from, full_factorial
from numpy.testing import assert_allclose

from app.analysis import Factor, FitSpec, analyse


def test_pilot_plant_two_cubed_factorial_effects():
    # Box, Hunter & Hunter, "Statistics for Experimenters", pilot-plant 2^3 (temperature T,
    # concentration C, catalyst K), yields in standard order 60 72 54 68 52 83 45 80.
    # Effects RECALLED FROM MEMORY: T 23.0, C -5.0, K 1.5, TC 1.5, TK 10.0, CK 0.0, TCK 0.5.
    y = np.array([60, 72, 54, 68, 52, 83, 45, 80], float)
    coded = full_factorial(3)
    frame = frame_from(coded, y, names=("T", "C", "K"))
    result = analyse(frame, FitSpec(response="Y", factors=(Factor("T"), Factor("C"), Factor("K")),
                                    model="full"))
    effects = {e.term: e.effect for e in result.effects}
    expected = {"T": 23.0, "C": -5.0, "K": 1.5, "T:C": 1.5, "T:K": 10.0, "C:K": 0.0, "T:C:K": 0.5}
    for term, value in expected.items():
        assert_allclose(effects[term], value, atol=1e-12)
    coef = {c.term: c.estimate for c in result.coefficients}
    assert_allclose(coef["Intercept"], 64.25, atol=1e-12)  # grand mean, recalled from memory
    assert_allclose(coef["T"], 11.5, atol=1e-12)             # half the effect (DESIGN.md)


def test_two_factor_central_composite_yield_surface():
    # Montgomery, "Design and Analysis of Experiments", CCD example on reaction time and
    # temperature (yield, 5 centre points, alpha = 1.414). Data and fitted model RECALLED FROM
    # MEMORY: y = 79.94 + 0.995 x1 + 0.515 x2 - 1.376 x1² - 1.001 x2² + 0.25 x1 x2, stationary
    # point near x1 = 0.389, x2 = 0.306 with predicted yield about 80.21.
    x = np.array([[-1, -1], [-1, 1], [1, -1], [1, 1], [0, 0], [0, 0], [0, 0], [0, 0], [0, 0],
                  [1.414, 0], [-1.414, 0], [0, 1.414], [0, -1.414]], float)
    y = np.array([76.5, 77.0, 78.0, 79.5, 79.9, 80.3, 80.0, 79.7, 79.8, 78.4, 75.6, 78.5, 77.0])
    frame = pd.DataFrame({"x1": x[:, 0], "x2": x[:, 1], "y": y}, index=pd.RangeIndex(1, 14))
    result = analyse(frame, FitSpec(response="y", factors=(Factor("x1"), Factor("x2")),
                                    model="quadratic"))
    assert result.design.kind == "central_composite"
    assert result.design.rotatable
    assert_allclose(result.design.alpha, 1.414, atol=1e-9)
    coef = {c.term: c.estimate for c in result.coefficients}
    assert_allclose([coef["Intercept"], coef["x1"], coef["x2"], coef["x1^2"], coef["x2^2"],
                     coef["x1:x2"]], [79.94, 0.995, 0.515, -1.376, -1.001, 0.25], atol=6e-3)
    b = np.array([coef["x1"], coef["x2"]])
    big_b = np.array([[coef["x1^2"], coef["x1:x2"] / 2], [coef["x1:x2"] / 2, coef["x2^2"]]])
    xs = -0.5 * np.linalg.solve(big_b, b)
    assert_allclose(xs, [0.389, 0.306], atol=0.01)
    from app.analysis import predict
    assert_allclose(predict(result, {"x1": xs[0], "x2": xs[1]})["predicted"], 80.21, atol=0.02)
    assert result.check("lack_of_fit").verdict == "pass"
