"""Derringer–Suich desirabilities against values worked by hand from the definitions
(Derringer & Suich 1980, J. Quality Technology 12, 214-219; the weighted geometric mean as in
Derringer 1994, Quality Progress 27(6) 51-58)."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis.optimize import parse_goal
from app.analysis.optimize.desirability import overall


def d(spec, y, observed=None):
    return parse_goal("Y", spec, observed).desirability(np.asarray(y, dtype=float))


def test_maximize():
    spec = {"goal": "maximize", "lower": 10, "upper": 20}
    # (15 - 10) / (20 - 10) = 0.5; below L -> 0; above U -> 1; at the ends 0 and 1
    assert_allclose(d(spec, [15, 8, 25, 10, 20]), [0.5, 0.0, 1.0, 0.0, 1.0], atol=1e-15)
    # shape s = 2: 0.5^2 = 0.25; s = 0.5: 0.5^0.5 = 0.70711
    assert_allclose(d({**spec, "shape": 2}, 15), 0.25, atol=1e-15)
    assert_allclose(d({**spec, "shape": 0.5}, 15), 0.7071067811865476, rtol=1e-12)


def test_minimize():
    spec = {"goal": "minimize", "lower": 2, "upper": 6}
    # (6 - 3) / (6 - 2) = 0.75; with s = 2: 0.5625; y <= L -> 1; y >= U -> 0
    assert_allclose(d(spec, [3, 1, 7]), [0.75, 1.0, 0.0], atol=1e-15)
    assert_allclose(d({**spec, "shape": 2}, 3), 0.5625, atol=1e-15)


def test_target_two_sided_with_separate_shapes():
    spec = {"goal": "target", "lower": 50, "target": 60, "upper": 80, "shape": [1, 2]}
    # below T: (55 - 50) / (60 - 50) = 0.5; above T: ((80 - 70) / (80 - 60))^2 = 0.5^2 = 0.25
    # at T: 1; outside [L, U]: 0
    assert_allclose(d(spec, [55, 70, 60, 45, 85]), [0.5, 0.25, 1.0, 0.0, 0.0], atol=1e-15)
    # one shape applies to both sides: ((80 - 70) / 20)^3 = 0.125, ((52 - 50) / 10)^3 = 0.008
    assert_allclose(d({**spec, "shape": 3}, [70, 52]), [0.125, 0.008], atol=1e-15)


def test_within_is_a_constraint_not_a_desirability():
    kept = parse_goal("Y", {"goal": "within", "lower": 1, "upper": 3}, None)
    assert kept.is_constraint
    assert kept.met([2, 3.5, 1, 3, 0.9]).tolist() == [True, False, True, True, False]
    # margins scaled by the limits' span (3 - 1 = 2): (2.5 - 1)/2 = 0.75, (3 - 2.5)/2 = 0.25
    assert_allclose(kept.margins(2.5), [[0.75, 0.25]], atol=1e-15)
    with pytest.raises(ValueError, match="kept within limits"):
        kept.desirability(2.0)
    # one-sided: only a lower limit
    one_sided = parse_goal("Y", {"goal": "within", "lower": 1}, None)
    assert one_sided.met([100, 0.5]).tolist() == [True, False]


def test_no_prediction_counts_as_undesirable():
    assert_allclose(d({"goal": "maximize", "lower": 0, "upper": 1}, [np.nan]), [0.0], atol=0)


def test_overall_desirability_is_the_weighted_geometric_mean():
    unit = {"goal": "maximize", "lower": 0, "upper": 1}
    goals = {"Y1": parse_goal("Y1", unit, None), "Y2": parse_goal("Y2", unit, None)}
    # equal weights: sqrt(0.5 * 0.25) = sqrt(0.125) = 0.353553
    assert_allclose(overall({"Y1": np.array(0.5), "Y2": np.array(0.25)}, goals),
                    0.3535533905932738, rtol=1e-12)
    # weights 3 and 1: (0.5^3 * 0.25)^(1/4) = 0.03125^0.25 = 0.420448
    weighted = {"Y1": parse_goal("Y1", {**unit, "weight": 3}, None), "Y2": goals["Y2"]}
    assert_allclose(overall({"Y1": np.array(0.5), "Y2": np.array(0.25)}, weighted),
                    0.42044820762685725, rtol=1e-12)
    # one response at d = 0 makes the combination unacceptable: D = 0
    assert_allclose(overall({"Y1": np.array(0.0), "Y2": np.array(0.9)}, goals), 0.0, atol=0)
    # scaling every weight by the same factor changes nothing: (0.5^2 * 0.25^2)^(1/4)
    doubled = {k: parse_goal(k, {**unit, "weight": 2}, None) for k in ("Y1", "Y2")}
    assert_allclose(overall({"Y1": np.array(0.5), "Y2": np.array(0.25)}, doubled),
                    0.3535533905932738, rtol=1e-12)
    # a limit to keep within takes no part in D or its weights: still sqrt(0.125)
    with_kept = {**goals, "Y3": parse_goal("Y3", {"goal": "within", "upper": 5}, None)}
    assert_allclose(overall({"Y1": np.array(0.5), "Y2": np.array(0.25)}, with_kept),
                    0.3535533905932738, rtol=1e-12)


def test_missing_limits_come_from_the_observed_range():
    goal = parse_goal("Y", {"goal": "maximize"}, (4.0, 12.0))
    assert (goal.lower, goal.upper, goal.limits_from) == (4.0, 12.0, "observed range")
    # (10 - 4) / (12 - 4) = 0.75
    assert_allclose(goal.desirability(10.0), 0.75, atol=1e-15)
    partial = parse_goal("Y", {"goal": "minimize", "upper": 9.0}, (4.0, 12.0))
    assert (partial.lower, partial.upper) == (4.0, 9.0)


def test_missing_limits_from_the_region_do_not_saturate():
    # maximize: upper at the greatest prediction in the region, lower at the observed minimum
    goal = parse_goal("Y", {"goal": "maximize"}, (4.0, 12.0), achievable=(3.0, 15.0))
    assert (goal.lower, goal.upper) == (4.0, 15.0)
    # minimize: lower at the least prediction, upper at the observed maximum
    goal = parse_goal("Y", {"goal": "minimize"}, (4.0, 12.0), achievable=(3.0, 15.0))
    assert (goal.lower, goal.upper) == (3.0, 12.0)


@pytest.mark.parametrize(("spec", "field"), [
    ({"goal": "largest"}, "goal"),
    ({"goal": "maximize", "lower": 3, "upper": 1}, "lower"),
    ({"goal": "maximize", "lower": 0, "upper": 1, "target": 1}, "target"),
    ({"goal": "target", "lower": 0, "upper": 1}, "target"),
    ({"goal": "target", "lower": 0, "target": 2, "upper": 1}, "target"),
    ({"goal": "maximize", "lower": 0, "upper": 1, "shape": 0}, "shape"),
    ({"goal": "maximize", "lower": 0, "upper": 1, "shape": [1, 2]}, "shape"),
    ({"goal": "maximize", "lower": 0, "upper": 1, "weight": "high"}, "weight"),
    ({"goal": "maximize", "lower": 0, "upper": 1, "weight": 0}, "weight"),
    ({"goal": "maximize", "lower": 0, "upper": float("nan")}, "upper"),
    ({"goal": "maximize", "lower": True, "upper": 2}, "lower"),
    ({"goal": "within"}, "lower"),
    ({"goal": "within", "lower": 2, "upper": 1}, "lower"),
    ({"goal": "within", "lower": 0, "weight": 2}, "weight"),
    ({"goal": "within", "lower": 0, "shape": 2}, "shape"),
    ({"goal": "maximize", "lowest": 1}, "lowest"),
    ({"goal": "maximize"}, "lower"),   # no limits and no observed values to take them from
])
def test_bad_goals_name_response_and_field(spec, field):
    with pytest.raises(ValueError, match="'Y'") as info:
        parse_goal("Y", spec, None)
    assert info.value.field == field


@pytest.mark.parametrize(("spec", "field", "new"), [
    ({"goal": "maximize", "low": 0}, "low", "'lower'"),
    ({"goal": "maximize", "high": 1}, "high", "'upper'"),
    ({"goal": "maximize", "importance": 2}, "importance", "'weight'"),
    ({"goal": "in_range", "lower": 0}, "goal", "'within'"),
    ({"goal": "in range", "lower": 0}, "goal", "'within'"),
])
def test_words_of_the_earlier_version_are_refused_with_the_new_name(spec, field, new):
    with pytest.raises(ValueError, match="no longer accepted") as info:
        parse_goal("Y", spec, (0.0, 1.0))
    assert info.value.field == field
    assert new in str(info.value)
