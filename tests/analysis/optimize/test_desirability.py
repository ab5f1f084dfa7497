"""Derringer–Suich desirabilities against values worked by hand from the definitions
(Derringer & Suich 1980, J. Quality Technology 12, 214-219; importance as in Derringer 1994)."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis.optimize import parse_goal
from app.analysis.optimize.desirability import composite


def d(spec, y, observed=None):
    return parse_goal("Y", spec, observed).desirability(np.asarray(y, dtype=float))


def test_maximize():
    spec = {"goal": "maximize", "low": 10, "high": 20}
    # (15 - 10) / (20 - 10) = 0.5; below L -> 0; above U -> 1; at the ends 0 and 1
    assert_allclose(d(spec, [15, 8, 25, 10, 20]), [0.5, 0.0, 1.0, 0.0, 1.0], atol=1e-15)
    # shape s = 2: 0.5^2 = 0.25; s = 0.5: 0.5^0.5 = 0.70711
    assert_allclose(d({**spec, "weight": 2}, 15), 0.25, atol=1e-15)
    assert_allclose(d({**spec, "weight": 0.5}, 15), 0.7071067811865476, rtol=1e-12)


def test_minimize():
    spec = {"goal": "minimize", "low": 2, "high": 6}
    # (6 - 3) / (6 - 2) = 0.75; with s = 2: 0.5625; y <= L -> 1; y >= U -> 0
    assert_allclose(d(spec, [3, 1, 7]), [0.75, 1.0, 0.0], atol=1e-15)
    assert_allclose(d({**spec, "weight": 2}, 3), 0.5625, atol=1e-15)


def test_target_two_sided_with_separate_shapes():
    spec = {"goal": "target", "low": 50, "target": 60, "high": 80, "weight": [1, 2]}
    # below T: (55 - 50) / (60 - 50) = 0.5; above T: ((80 - 70) / (80 - 60))^2 = 0.5^2 = 0.25
    # at T: 1; outside [L, U]: 0
    assert_allclose(d(spec, [55, 70, 60, 45, 85]), [0.5, 0.25, 1.0, 0.0, 0.0], atol=1e-15)
    # one weight applies to both sides: ((80 - 70) / 20)^3 = 0.125, ((52 - 50) / 10)^3 = 0.008
    assert_allclose(d({**spec, "weight": 3}, [70, 52]), [0.125, 0.008], atol=1e-15)


def test_in_range():
    assert_allclose(d({"goal": "in_range", "low": 1, "high": 3}, [2, 3.5, 1, 3, 0.9]),
                    [1, 0, 1, 1, 0], atol=0)
    # one-sided: only a lower limit
    assert_allclose(d({"goal": "in range", "low": 1}, [100, 0.5]), [1, 0], atol=0)


def test_no_prediction_counts_as_undesirable():
    assert_allclose(d({"goal": "maximize", "low": 0, "high": 1}, [np.nan]), [0.0], atol=0)


def test_composite_is_the_importance_weighted_geometric_mean():
    goals = {"Y1": parse_goal("Y1", {"goal": "maximize", "low": 0, "high": 1}, None),
             "Y2": parse_goal("Y2", {"goal": "maximize", "low": 0, "high": 1}, None)}
    # equal importance: sqrt(0.5 * 0.25) = sqrt(0.125) = 0.353553
    assert_allclose(composite({"Y1": np.array(0.5), "Y2": np.array(0.25)}, goals),
                    0.3535533905932738, rtol=1e-12)
    # importance 3 and 1: (0.5^3 * 0.25)^(1/4) = 0.03125^0.25 = 0.420448
    weighted = {"Y1": parse_goal("Y1", {"goal": "maximize", "low": 0, "high": 1,
                                        "importance": 3}, None), "Y2": goals["Y2"]}
    assert_allclose(composite({"Y1": np.array(0.5), "Y2": np.array(0.25)}, weighted),
                    0.42044820762685725, rtol=1e-12)
    # one response at d = 0 makes the combination unacceptable: D = 0
    assert_allclose(composite({"Y1": np.array(0.0), "Y2": np.array(0.9)}, goals), 0.0, atol=0)
    # scaling every importance by the same factor changes nothing: (0.5^2 * 0.25^2)^(1/4)
    doubled = {k: parse_goal(k, {"goal": "maximize", "low": 0, "high": 1, "importance": 2}, None)
               for k in ("Y1", "Y2")}
    assert_allclose(composite({"Y1": np.array(0.5), "Y2": np.array(0.25)}, doubled),
                    0.3535533905932738, rtol=1e-12)


def test_missing_limits_come_from_the_observed_range():
    goal = parse_goal("Y", {"goal": "maximize"}, (4.0, 12.0))
    assert (goal.low, goal.high, goal.limits_from) == (4.0, 12.0, "observed range")
    # (10 - 4) / (12 - 4) = 0.75
    assert_allclose(goal.desirability(10.0), 0.75, atol=1e-15)
    partial = parse_goal("Y", {"goal": "minimize", "high": 9.0}, (4.0, 12.0))
    assert (partial.low, partial.high) == (4.0, 9.0)


@pytest.mark.parametrize(("spec", "field"), [
    ({"goal": "largest"}, "goal"),
    ({"goal": "maximize", "low": 3, "high": 1}, "low"),
    ({"goal": "maximize", "low": 0, "high": 1, "target": 1}, "target"),
    ({"goal": "target", "low": 0, "high": 1}, "target"),
    ({"goal": "target", "low": 0, "target": 2, "high": 1}, "target"),
    ({"goal": "maximize", "low": 0, "high": 1, "weight": 0}, "weight"),
    ({"goal": "maximize", "low": 0, "high": 1, "weight": [1, 2]}, "weight"),
    ({"goal": "maximize", "low": 0, "high": 1, "importance": "high"}, "importance"),
    ({"goal": "maximize", "low": 0, "high": float("nan")}, "high"),
    ({"goal": "maximize", "low": True, "high": 2}, "low"),
    ({"goal": "in_range"}, "low"),
    ({"goal": "maximize", "lowest": 1}, "lowest"),
    ({"goal": "maximize"}, "low"),   # no limits and no observed values to take them from
])
def test_bad_goals_name_response_and_field(spec, field):
    with pytest.raises(ValueError, match="'Y'") as info:
        parse_goal("Y", spec, None)
    assert info.value.field == field
