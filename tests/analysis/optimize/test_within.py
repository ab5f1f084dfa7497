"""Keeping a response within limits: a constraint on the search, not part of D.

Reference values are worked by hand (Lagrange on the line A + B = 0.5) and checked against a
brute-force grid over the coded square computed here from the models' own coefficients, not
through the search.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis import predict
from app.analysis.optimize import propose

from .fits import hand_model

LEVELS = {"A": (150.0, 170.0), "B": (2.0, 3.0)}   # coded A = (v - 160)/10, B = (v - 2.5)/0.5


def hardness():
    # Y = 10 + 2A + B - A^2 - B^2: unconstrained maximum at A = 1, B = 0.5 (Y = 11.25)
    return hand_model({"A": 2.0, "B": 1.0, "A^2": -1.0, "B^2": -1.0}, 10.0, levels=LEVELS,
                      response="Y")


def haze():
    return hand_model({"A": 1.0, "B": 1.0}, 0.0, levels=LEVELS, response="Z")   # Z = A + B


def coded(settings):
    return np.array([(settings["A"] - 160.0) / 10.0, (settings["B"] - 2.5) / 0.5])


def brute_force(keep_upper):
    """Best Y on a 2001 x 2001 grid of the coded square with A + B <= keep_upper."""
    a, b = np.meshgrid(np.linspace(-1, 1, 2001), np.linspace(-1, 1, 2001), indexing="ij")
    y = 10 + 2 * a + b - a**2 - b**2
    y = np.where(a + b <= keep_upper, y, -np.inf)
    i = np.unravel_index(np.argmax(y), y.shape)
    return float(y[i]), np.array([a[i], b[i]])


GOAL_Y = {"goal": "maximize", "lower": 7.0, "upper": 13.0}


def test_a_limit_that_cuts_off_the_optimum_moves_the_proposal_to_its_boundary():
    fits = {"Y": hardness(), "Z": haze()}
    out = propose(fits, {"Y": GOAL_Y, "Z": {"goal": "within", "upper": 0.5}})
    x = coded(out["optimum"]["settings"])
    # on the boundary A + B = 0.5 (the unconstrained optimum has A + B = 1.5)
    assert_allclose(x.sum(), 0.5, atol=1e-5)
    # by hand: on B = 0.5 - A, Y = 10.25 + 2A - 2A^2, best at A = 0.5, B = 0, Y = 10.75
    assert_allclose(x, [0.5, 0.0], atol=1e-3)
    assert_allclose(out["optimum"]["predicted"]["Y"], 10.75, atol=1e-6)
    # the brute-force grid (spacing 0.001) agrees to its resolution
    grid_best, grid_point = brute_force(0.5)
    assert_allclose(out["optimum"]["predicted"]["Y"], grid_best, atol=1e-5)
    assert out["optimum"]["predicted"]["Y"] >= grid_best - 1e-6
    assert_allclose(x, grid_point, atol=2e-3)
    kept = out["constraints"]["Z"]
    assert kept["met"] is True and kept["upper"] == 0.5 and kept["lower"] is None
    assert_allclose(kept["predicted"], predict(haze(), out["optimum"]["settings"])["predicted"],
                    rtol=1e-12)
    # Z is a constraint: it has no desirability and no weight in D
    assert "Z" not in out["optimum"]["individual_desirability"]
    assert out["goals"]["Z"] == {"goal": "within", "lower": None, "upper": 0.5,
                                 "limits_from": "request"}
    # D = (10.75 - 7) / (13 - 7) = 0.625
    assert_allclose(out["optimum"]["desirability"], 0.625, atol=1e-6)
    assert out["check"]["status"] == "agrees"


@pytest.mark.parametrize("limits", [{"upper": 10.0}, {"lower": -10.0, "upper": 10.0}])
def test_a_limit_that_is_met_leaves_d_and_the_settings_alone(limits):
    fits = {"Y": hardness(), "Z": haze()}
    alone = propose({"Y": hardness()}, {"Y": GOAL_Y})
    kept = propose(fits, {"Y": GOAL_Y, "Z": {"goal": "within", **limits}})
    # by hand: Y = 11.25 at A = 1, B = 0.5, so D = (11.25 - 7) / (13 - 7) = 0.708333
    for out in (alone, kept):
        assert_allclose(out["optimum"]["desirability"], 4.25 / 6, atol=1e-6)
        assert_allclose(coded(out["optimum"]["settings"]), [1.0, 0.5], atol=1e-3)
    assert kept["constraints"]["Z"]["met"] is True


def test_a_met_limit_does_not_change_the_weights_of_d():
    fits = {"Y": hardness(), "Z": haze(), "W": hand_model({"A": -1.0}, 5.0, levels=LEVELS,
                                                          response="W")}
    goals = {"Y": {**GOAL_Y, "weight": 2.0}, "W": {"goal": "minimize", "lower": 3.0,
                                                   "upper": 7.0}}
    plain = propose(fits, goals)
    kept = propose(fits, {**goals, "Z": {"goal": "within", "lower": -10.0, "upper": 10.0}})
    for out in (plain, kept):
        y, w = out["optimum"]["predicted"]["Y"], out["optimum"]["predicted"]["W"]
        d_y, d_w = (y - 7.0) / 6.0, (7.0 - w) / 4.0
        # D = (d_Y^2 d_W)^(1/3): weights 2 and 1, the kept response has none
        assert_allclose(out["optimum"]["desirability"], (d_y**2 * d_w) ** (1 / 3), rtol=1e-9)
    assert_allclose(kept["optimum"]["desirability"], plain["optimum"]["desirability"],
                    rtol=1e-9)
    assert_allclose(coded(kept["optimum"]["settings"]), coded(plain["optimum"]["settings"]),
                    atol=1e-4)
