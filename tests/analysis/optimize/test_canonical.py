"""Stationary point and canonical analysis (coded units)."""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from app.analysis import Factor, FitSpec, analyse
from app.analysis.optimize import Surface, canonical_analysis, classify, single_goal

from .fits import ROTATABLE_2, hand_model

# Textbook example, recalled from memory: Montgomery, "Design and Analysis of Experiments",
# the chemical-process yield study (a rotatable central composite design in reaction time
# 80-90 min and temperature 170-180 °F, alpha = 1.414, five centre points). Printed there:
#   yhat = 79.94 + 0.995 x1 + 0.515 x2 - 1.376 x1^2 - 1.001 x2^2 + 0.250 x1 x2,
#   stationary point x1 = 0.389, x2 = 0.306 (about 87 min and 176.5 °F), yhat_s = 80.21,
#   canonical form yhat = 80.21 - 0.9634 w1^2 - 1.4141 w2^2: a maximum.
TIME = [80, 80, 90, 90, 85, 85, 85, 85, 85, 92.07, 77.93, 85, 85]
TEMPERATURE = [170, 180, 170, 180, 175, 175, 175, 175, 175, 175, 175, 182.07, 167.93]
YIELD = [76.5, 77.0, 78.0, 79.5, 79.9, 80.3, 80.0, 79.7, 79.8, 78.4, 75.6, 78.5, 77.0]


@pytest.fixture(scope="module")
def yield_fit() -> dict:
    frame = pd.DataFrame({"Time": TIME, "Temperature": TEMPERATURE, "Yield": YIELD},
                         index=pd.RangeIndex(1, 14, name="row"))
    spec = FitSpec(response="Yield", model="quadratic",
                   factors=(Factor("Time", 80, 90, "min"), Factor("Temperature", 170, 180, "°F")))
    return analyse(frame, spec).to_dict()


def test_textbook_stationary_point_and_eigenvalues(yield_fit):
    ca = canonical_analysis(Surface.from_result(yield_fit, "Yield"))
    # By hand from the printed coefficients: b = (0.995, 0.515), B = [[-1.376, 0.125],
    # [0.125, -1.001]] (the interaction 0.250 split in halves). det B = 1.377376 - 0.015625 =
    # 1.361751; B^-1 b = (-1.060370, -0.833015) / 1.361751 = (-0.77868, -0.61172);
    # x_s = -B^-1 b / 2 = (0.3893, 0.3059).
    assert_allclose(ca.coded, [0.389, 0.306], atol=1e-3)  # Montgomery, printed to 3 decimals
    # tr B = -2.377, disc = 2.377^2 - 4 * 1.361751 = 0.203125, lambda = (-2.377 -/+ 0.4507)/2
    # = -1.4139, -0.9632 (hand); printed -1.4141, -0.9634.
    assert_allclose(ca.eigenvalues, [-1.4141, -0.9634], atol=5e-4)
    # yhat_s = b0 + x_s'b / 2 = 79.94 + (0.995 * 0.3893 + 0.515 * 0.3059) / 2 = 80.2124
    assert_allclose(ca.predicted_model_scale, 80.21, atol=5e-3)
    assert ca.kind == "maximum"
    assert ca.unique


def test_textbook_stationary_point_in_actual_units_and_region(yield_fit):
    out = single_goal(yield_fit, "maximize")
    sp = out["stationary_point"]
    # 85 + 5 * 0.389 = 86.95 min and 175 + 5 * 0.306 = 176.53 °F (Montgomery: ~87 min, 176.5 °F)
    assert_allclose(sp["settings"]["Time"], 86.95, atol=0.01)
    assert_allclose(sp["settings"]["Temperature"], 176.53, atol=0.01)
    assert_allclose(sp["predicted"], 80.21, atol=5e-3)
    assert sp["kind"] == "maximum" and sp["inside_region"]
    assert out["region"]["kind"] == "sphere"
    assert_allclose(out["region"]["radius"], 1.414, atol=1e-3)  # axial distance of the design
    # a maximum inside the region is where the search for the largest yield must end
    assert_allclose([out["optimum"]["coded"]["Time"], out["optimum"]["coded"]["Temperature"]],
                    [0.389, 0.306], atol=2e-3)
    assert_allclose(out["optimum"]["predicted"], sp["predicted"], rtol=1e-9)
    assert out["grid_check"]["agrees"]


@pytest.mark.parametrize(("terms", "kind", "eigen"), [
    # y = -A^2 - 2B^2: B = diag(-1, -2) -> eigenvalues -2, -1, a maximum at the origin
    ({"A": 0.0, "B": 0.0, "A^2": -1.0, "B^2": -2.0}, "maximum", [-2.0, -1.0]),
    # y = A^2 + 3B^2 + 2AB: B = [[1, 1], [1, 3]], eigenvalues 2 -/+ sqrt(2) = 0.5858, 3.4142
    ({"A": 0.0, "B": 0.0, "A:B": 2.0, "A^2": 1.0, "B^2": 3.0}, "minimum",
     [2 - 2**0.5, 2 + 2**0.5]),
    # y = A^2 - B^2: eigenvalues -1, 1, a saddle
    ({"A": 0.0, "B": 0.0, "A^2": 1.0, "B^2": -1.0}, "saddle", [-1.0, 1.0]),
    # y = -A^2 - 0.01B^2: |lambda_min| / |lambda_max| = 0.01 <= 0.05, a ridge
    ({"A": 0.0, "B": 0.0, "A^2": -1.0, "B^2": -0.01}, "ridge", [-1.0, -0.01]),
])
def test_constructed_kinds(terms, kind, eigen):
    ca = canonical_analysis(Surface.from_result(hand_model(terms, 5.0), "Y"))
    assert ca.kind == kind
    assert_allclose(ca.eigenvalues, eigen, atol=1e-12)
    assert_allclose(ca.coded, [0.0, 0.0], atol=1e-12)


def test_constructed_off_centre_stationary_point():
    # y = 10 + 4A - 2B - A^2 - B^2 + AB: b = (4, -2), B = [[-1, .5], [.5, -1]];
    # b + 2Bx = 0 -> 4 - 2x1 + x2 = 0 and -2 + x1 - 2x2 = 0 -> x1 = 2, x2 = 0;
    # y_s = 10 + (4 * 2 - 2 * 0) / 2 = 14. Eigenvalues of B: -1 -/+ 0.5 = -1.5, -0.5.
    doc = hand_model({"A": 4.0, "B": -2.0, "A:B": 1.0, "A^2": -1.0, "B^2": -1.0}, 10.0,
                     design=ROTATABLE_2)
    ca = canonical_analysis(Surface.from_result(doc, "Y"))
    assert_allclose(ca.coded, [2.0, 0.0], atol=1e-12)
    assert_allclose(ca.predicted_model_scale, 14.0, atol=1e-12)
    assert_allclose(ca.eigenvalues, [-1.5, -0.5], atol=1e-12)
    out = single_goal(doc, "maximize")
    # (2, 0) lies outside the sphere of radius sqrt(2), so the optimum sits on its surface
    assert out["stationary_point"]["inside_region"] is False
    x = np.array(list(out["optimum"]["coded"].values()))
    assert_allclose(np.sqrt(x @ x), 2**0.5, atol=1e-6)


def test_reciprocal_transform_turns_a_model_maximum_into_a_response_minimum():
    # on the 1/y scale the surface has a maximum; y = 1/z then has a minimum there
    doc = hand_model({"A": 0.0, "B": 0.0, "A^2": -0.1, "B^2": -0.2}, 1.0, transform="inverse")
    assert canonical_analysis(Surface.from_result(doc, "Y")).kind == "minimum"


def test_factor_absent_from_model_is_reported_and_not_a_ridge():
    doc = hand_model({"A": 1.0, "A^2": -1.0}, 0.0, names=("A", "B"))
    ca = canonical_analysis(Surface.from_result(doc, "Y"))
    assert ca.inactive == ("B",)
    assert ca.kind == "maximum"
    assert_allclose(ca.coded, [0.5, 0.0], atol=1e-12)  # 1 - 2x = 0


def test_models_that_are_not_quadratic_get_no_canonical_analysis():
    linear = hand_model({"A": 1.0, "B": 2.0, "A:B": 0.5}, 0.0)
    cubic = hand_model({"A": 1.0, "A^2": -1.0, "A^3": 0.2}, 0.0, names=("A",))
    assert canonical_analysis(Surface.from_result(linear, "Y")) is None
    assert canonical_analysis(Surface.from_result(cubic, "Y")) is None


def test_ridge_rule_threshold():
    assert classify(np.array([-1.0, -0.05])) == "ridge"
    assert classify(np.array([-1.0, -0.0501])) == "maximum"
    assert classify(np.array([0.2, 1.0])) == "minimum"
