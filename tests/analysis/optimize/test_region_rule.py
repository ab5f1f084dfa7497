"""The search region follows the design: sphere for rotatable and spherical central composite
designs, cube for face-centred, factorial, Box–Behnken and other designs."""

from itertools import combinations, product

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis.optimize import propose
from app.analysis.optimize.region import region_for_design

from .fits import ccd, fit, quadratic_truth

TRUTH = ([1.0, -0.5, 0.3], [[-1.0, 0.2, 0.0], [0.2, -0.8, 0.1], [0.0, 0.1, -0.6]])


def box_behnken_3(centre: int = 3) -> np.ndarray:
    edges = []
    for i, j in combinations(range(3), 2):
        for a, b in product([-1.0, 1.0], repeat=2):
            row = np.zeros(3)
            row[i], row[j] = a, b
            edges.append(row)
    return np.vstack([np.array(edges), np.zeros((centre, 3))])


def factorial_3(centre: int = 4) -> np.ndarray:
    return np.vstack([np.array(list(product([-1.0, 1.0], repeat=3))), np.zeros((centre, 3))])


def _doc(design, model="quadratic", exclusions=()):
    y = quadratic_truth(design, 50.0, *TRUTH) + np.random.default_rng(3).normal(0, 0.1,
                                                                              len(design))
    doc = fit(design, y, model=model)
    for row in exclusions:   # mark a run excluded, as a refit with that exclusion would
        doc["runs"][row - 1]["excluded"] = True
    doc["design"]["rotatable"] = doc["design"]["rotatable"] if not exclusions else False
    return doc


# alpha: rotatable 8^(1/4) = 1.682, spherical sqrt(3) = 1.732 (published CCD tables)
@pytest.mark.parametrize("design, shape, radius, word", [
    (ccd(3, 8**0.25, 6), "sphere", 8**0.25, "rotatable"),
    (ccd(3, 3**0.5, 6), "sphere", 3**0.5, "spherical"),
    (ccd(3, 1.0, 6), "cube", None, "face-centred"),
    (ccd(3, 1.3, 6), "cube", None, "neither rotatable nor spherical"),
    (box_behnken_3(), "cube", None, "Box–Behnken"),
])
def test_shape_follows_the_design(design, shape, radius, word):
    doc = _doc(design)
    choice = region_for_design(doc["design"], doc["runs"])
    assert choice.shape == shape and word in choice.why
    if radius is None:
        assert choice.radius is None
    else:
        assert_allclose(choice.radius, radius, rtol=1e-9)
    out = propose({"Y": doc}, {"Y": {"goal": "maximize"}})
    assert out["region"]["shape"] == shape and out["region"]["why"] == choice.why
    x = np.array(list(out["optimum"]["coded"].values()))
    if shape == "sphere":
        assert x @ x <= radius**2 + 1e-7
    else:
        assert np.all(np.abs(x) <= 1.0 + 1e-7)


def test_factorial_is_searched_over_the_cube():
    doc = _doc(factorial_3(), model="interaction")
    choice = region_for_design(doc["design"], doc["runs"])
    assert choice.shape == "cube" and "factorial" in choice.why


def test_an_excluded_run_does_not_change_the_region():
    # the included runs alone no longer look rotatable; the design as run still is
    doc = _doc(ccd(3, 8**0.25, 6), exclusions=(2,))
    choice = region_for_design(doc["design"], doc["runs"])
    assert choice.shape == "sphere" and "rotatable" in choice.why
    assert_allclose(choice.radius, 8**0.25, rtol=1e-9)


def test_without_runs_the_design_part_decides():
    rotatable = {"kind": "central_composite", "rotatable": True, "alpha": 1.682,
                 "ccd_type": "circumscribed", "n_factors": 3}
    assert region_for_design(rotatable, []).shape == "sphere"
    assert region_for_design({"kind": "general"}, []).shape == "cube"
    assert region_for_design(None).shape == "cube"


def test_bounds_and_fixed_factors_still_cut_the_sphere():
    doc = _doc(ccd(3, 8**0.25, 6))
    out = propose({"Y": doc}, {"Y": {"goal": "maximize"}}, bounds={"A": [-0.5, 0.2]},
                  fixed={"C": 0.4})
    x = np.array(list(out["optimum"]["coded"].values()))
    assert -0.5 - 1e-9 <= x[0] <= 0.2 + 1e-9 and x[2] == pytest.approx(0.4, abs=1e-12)
    assert x @ x <= 8**0.5 + 1e-7
    assert out["check"]["status"] == "agrees"
