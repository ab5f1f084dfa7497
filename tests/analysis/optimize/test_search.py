"""The setpoint search: stays in the region, honours bounds and fixed factors, matches the grid."""

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis import predict
from app.analysis.optimize import SetpointError, propose, single_goal
from app.analysis.optimize.desirability import parse_goal

from .fits import ROTATABLE_2, ccd, fit, hand_model, quadratic_truth

PLANE = {"A": 2.0, "B": 1.0}   # y = 10 + 2A + B: largest at the cube corner (1, 1)
LEVELS = {"A": (150.0, 170.0), "B": (2.0, 3.0)}


def coded_vector(out):
    return np.array(list(out["optimum"]["coded"].values()))


def test_cube_maximum_of_a_plane_is_the_corner():
    out = single_goal(hand_model(PLANE, 10.0, levels=LEVELS), "maximize")
    assert_allclose(coded_vector(out), [1.0, 1.0], atol=1e-9)
    assert_allclose(list(out["optimum"]["settings"].values()), [170.0, 3.0], atol=1e-7)
    assert_allclose(out["optimum"]["predicted"], 13.0, atol=1e-8)   # 10 + 2 + 1
    assert out["region"]["kind"] == "cube" and out["grid_check"]["agrees"]
    json.dumps(out, allow_nan=False)
    # gradient: dy/dA = 2 per coded unit = 2 / 10 per °C (half-range 10); dy/dB = 1 / 0.5
    assert_allclose(list(out["optimum"]["gradient"].values()), [2.0, 1.0], rtol=1e-12)
    assert_allclose(list(out["optimum"]["gradient_actual"].values()), [0.2, 2.0], rtol=1e-12)


def test_sphere_maximum_of_a_plane_lies_along_the_gradient():
    # on a sphere of radius sqrt(2), the maximum of 2A + B is sqrt(2) (2, 1) / sqrt(5)
    out = single_goal(hand_model(PLANE, 10.0, design=ROTATABLE_2), "maximize")
    assert_allclose(coded_vector(out), np.sqrt(2) * np.array([2, 1]) / np.sqrt(5), atol=1e-5)
    assert out["region"]["kind"] == "sphere" and out["grid_check"]["agrees"]
    minimum = single_goal(hand_model(PLANE, 10.0, design=ROTATABLE_2), "minimize")
    assert_allclose(coded_vector(minimum), -np.sqrt(2) * np.array([2, 1]) / np.sqrt(5),
                    atol=1e-5)


def test_bounds_and_fixed_factors_are_respected():
    doc = hand_model(PLANE, 10.0, levels=LEVELS)
    out = single_goal(doc, "maximize", bounds={"A": [152.0, 160.0]}, fixed={"B": 2.25})
    assert_allclose(out["optimum"]["settings"]["A"], 160.0, atol=1e-7)  # upper bound
    assert_allclose(out["optimum"]["settings"]["B"], 2.25, atol=1e-12)  # fixed
    low = single_goal(doc, "minimize", bounds={"A": {"low": 152.0}})
    assert_allclose(list(low["optimum"]["settings"].values()), [152.0, 2.0], atol=1e-7)
    assert low["region"]["bounds"]["A"]["actual"] == [152.0, 170.0]


def test_sphere_with_a_fixed_factor_keeps_the_point_inside():
    out = single_goal(hand_model(PLANE, 10.0, design=ROTATABLE_2), "maximize", fixed={"B": 1.0})
    x = coded_vector(out)
    # A may go up to sqrt(2 - 1) = 1 with B fixed at 1
    assert_allclose(x, [1.0, 1.0], atol=1e-6)
    assert x @ x <= 2.0 + 1e-7


def test_target_is_hit_and_agrees_with_the_grid():
    doc = hand_model(PLANE, 10.0, levels=LEVELS)
    out = single_goal(doc, "target=11.5")
    assert_allclose(out["optimum"]["predicted"], 11.5, atol=1e-6)
    assert out["grid_check"]["agrees"]
    assert abs(out["grid_check"]["best_predicted"] - 11.5) < 0.05   # the grid gets close too


@pytest.fixture(scope="module")
def two_responses():
    rng = np.random.default_rng(11)
    design = ccd(2, 2**0.5, 5)
    y1 = quadratic_truth(design, 80, [1.0, 0.5], [[-1.4, 0.1], [0.1, -1.0]])
    y2 = quadratic_truth(design, 60, [-2.0, 1.5], [[0.3, 0.0], [0.0, 0.2]])
    return {"Strength": fit(design, y1 + rng.normal(0, 0.2, 13), response="Strength",
                            levels=LEVELS),
            "Haze": fit(design, y2 + rng.normal(0, 0.2, 13), response="Haze", levels=LEVELS)}


def test_propose_combines_desirabilities_and_reports_intervals(two_responses):
    goals = {"Strength": {"goal": "maximize", "lower": 75, "upper": 81, "weight": 2},
             "Haze": {"goal": "minimize", "lower": 57, "upper": 62}}
    out = propose(two_responses, goals, seed=3)
    opt = out["optimum"]
    assert out["region"]["kind"] == "sphere"
    x = np.array(list(opt["coded"].values()))
    assert x @ x <= 2.0 + 1e-7
    # every reported prediction is predict()'s at the settings
    for r, doc in two_responses.items():
        p = predict(doc, opt["settings"])
        assert_allclose(opt["predicted"][r], p["predicted"], rtol=1e-12)
        assert_allclose(opt["pi"][r], p["pi"], rtol=1e-12)
        assert opt["ci"][r][0] < opt["predicted"][r] < opt["ci"][r][1]
        assert opt["pi"][r][0] < opt["ci"][r][0]
    # D from the individual d's: (d1^2 * d2)^(1/3), each d from its goal
    d1 = parse_goal("Strength", goals["Strength"], None).desirability(opt["predicted"]["Strength"])
    d2 = parse_goal("Haze", goals["Haze"], None).desirability(opt["predicted"]["Haze"])
    assert_allclose(opt["individual_desirability"]["Strength"], d1, rtol=1e-12)
    assert_allclose(opt["desirability"], (d1**2 * d2) ** (1 / 3), rtol=1e-12)
    assert 0 < opt["desirability"] < 1
    check = out["grid_check"]
    assert check["agrees"]
    assert check["best_desirability"] <= opt["desirability"] + 1e-3
    assert out["stationary_point"]["Strength"]["kind"] == "maximum"
    assert out["stationary_point"]["Haze"]["kind"] == "minimum"
    json.dumps(out, allow_nan=False)   # only builtins and finite numbers: storable as is


def test_search_is_reproducible_for_a_seed(two_responses):
    goals = {"Strength": {"goal": "target", "lower": 76, "target": 79, "upper": 81}}
    first = propose(two_responses, goals, seed=5)
    again = propose(two_responses, goals, seed=5)
    assert first["optimum"]["coded"] == again["optimum"]["coded"]
    assert_allclose(first["optimum"]["predicted"]["Strength"], 79.0, atol=1e-4)


def test_impossible_goals_give_zero_and_say_so(two_responses):
    goals = {"Strength": {"goal": "maximize", "lower": 500, "upper": 600}}
    out = propose(two_responses, goals)
    assert out["optimum"]["desirability"] == 0.0
    assert "relax the goals" in out["note"]


def test_limits_no_setting_can_keep_are_refused(two_responses):
    goals = {"Strength": {"goal": "maximize"}, "Haze": {"goal": "within", "lower": 500}}
    with pytest.raises(SetpointError, match="keeps Haze within") as info:
        propose(two_responses, goals)
    assert info.value.field == "goals"


def test_a_local_search_that_misses_is_caught_by_the_grid():
    # a flat objective with one narrow well: random starts see no slope, the grid finds the well
    from app.analysis.optimize.region import build_region
    from app.analysis.optimize.search import search

    region = build_region([{"name": "A"}, {"name": "B"}], "cube", None)

    def objective(coded):
        return -np.all(np.abs(coded - 0.77) < 0.02, axis=1).astype(float)

    found = search(region, objective, seed=0)
    assert found.grid_objective == -1.0 and found.local_objective == 0.0
    assert not found.agrees and found.source.startswith("grid")
    assert found.objective == -1.0 and region.inside(found.coded)


def test_a_proposal_on_the_region_edge_says_so():
    """A plane's maximum is a cube corner (both factors at their high ends) or a point on the
    sphere: the proposal names the edge, since the model cannot see past it. A bound the
    engineer set inside the region is not the region's edge, nor is a factor fixed at its
    high level; a target met inside the region has nothing beyond it."""
    corner = single_goal(hand_model(PLANE, 10.0, levels=LEVELS), "maximize")
    assert [(a["factor"], a["side"], a["setting"]) for a in corner["edge"]["factors"]] == [
        ("A", "high", 170.0), ("B", "high", 3.0)]
    assert corner["edge"]["note"].startswith("The proposal sits on the edge of the region "
                                             "searched (A at the high end of its range (170); "
                                             "B at the high end")
    low = single_goal(hand_model(PLANE, 10.0, levels=LEVELS), "minimize", fixed={"B": 2.5},
                      bounds={"A": [152.0, 170.0]})
    assert low["edge"] is None  # A stops at the engineer's bound, B is fixed
    held = single_goal(hand_model(PLANE, 10.0, levels=LEVELS), "maximize", fixed={"B": 3.0})
    assert [a["factor"] for a in held["edge"]["factors"]] == ["A"]  # B fixed at its high level
    sphere = single_goal(hand_model(PLANE, 10.0, design=ROTATABLE_2), "maximize")
    assert sphere["edge"]["shape"] == "sphere" and "1.414 coded units" in sphere["edge"]["note"]
    fixed_on_sphere = single_goal(hand_model(PLANE, 10.0, design=ROTATABLE_2), "maximize",
                                  fixed={"B": 1.0})
    assert fixed_on_sphere["edge"]["shape"] == "sphere"  # A runs to the sphere at B = 1
    # a maximum inside the region: 10 - A^2 - B^2 peaks at the centre
    bowl = propose({"Y": hand_model({"A^2": -1.0, "B^2": -1.0}, 10.0, levels=LEVELS)},
                   {"Y": {"goal": "maximize"}})
    assert_allclose(coded_vector(bowl), [0.0, 0.0], atol=1e-4)
    assert bowl["edge"] is None
    # a target met at (A, B) inside the region, though the point chosen may touch the cube
    target = {"Y": {"goal": "target", "target": 12.5, "lower": 11.0, "upper": 13.0}}
    met = propose({"Y": hand_model(PLANE, 10.0, levels=LEVELS)}, target)
    assert met["optimum"]["desirability"] > 1 - 1e-9 and met["edge"] is None
    assert single_goal(hand_model(PLANE, 10.0, levels=LEVELS), "target=12.5")["edge"] is None
    # a target beyond the region's reach: the best is at the corner, and the note says so
    far = {"Y": {"goal": "target", "target": 14.0, "lower": 11.0, "upper": 15.0}}
    assert propose({"Y": hand_model(PLANE, 10.0, levels=LEVELS)}, far)["edge"] is not None


def test_a_target_met_along_a_curve_proposes_its_point_nearest_the_centre():
    """y = 10 + 2A + B + 0.5AB reaches the target 12 along the curve B = (2 - 2A)/(1 + 0.5A):
    D = 1 all along it. The proposal is the curve's point nearest the design centre, found here
    independently by walking the curve on a fine grid of A."""
    doc = hand_model({"A": 2.0, "B": 1.0, "A:B": 0.5}, 10.0, levels=LEVELS)
    out = propose({"Y": doc}, {"Y": {"goal": "target", "target": 12.0, "lower": 10.0,
                                     "upper": 14.0}})
    a = np.linspace(-1.0, 1.0, 2_000_001)
    b = (2.0 - 2.0 * a) / (1.0 + 0.5 * a)
    inside = np.abs(b) <= 1.0
    nearest = int(np.argmin(np.where(inside, a**2 + b**2, np.inf)))
    assert_allclose(coded_vector(out), [a[nearest], b[nearest]], atol=1e-4)
    assert out["optimum"]["desirability"] > 1 - 1e-9
    assert_allclose(out["optimum"]["predicted"]["Y"], 12.0, atol=1e-8)
    assert out["check"]["proposal"]["from"].endswith("its point nearest the design centre")
