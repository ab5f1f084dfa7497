"""Design-space map: PI inside the specification limits at every marked point."""

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app.analysis import predict
from app.analysis.optimize import design_space

from .fits import ccd, fit, quadratic_truth

LEVELS = {"A": (150.0, 170.0), "B": (2.0, 3.0), "C": (10.0, 20.0)}


@pytest.fixture(scope="module")
def fits():
    rng = np.random.default_rng(5)
    design = ccd(3, 8**0.25, 6)   # rotatable: the map is cut to the sphere
    y1 = quadratic_truth(design, 80, [1.0, 0.5, 0.2], np.diag([-1.4, -1.0, -0.5]))
    y2 = quadratic_truth(design, 60, [-2.0, 1.5, 0.0], np.diag([0.3, 0.2, 0.1]))
    return {"Strength": fit(design, y1 + rng.normal(0, 0.3, 20), response="Strength",
                            levels=LEVELS),
            "Haze": fit(design, y2 + rng.normal(0, 0.3, 20), response="Haze", levels=LEVELS)}


def test_inside_means_every_pi_within_its_limits(fits):
    specs = {"Strength": {"lower": 77.0}, "Haze": {"upper": 62.0}}
    out = design_space(fits, specs, "A", "B", fixed={"C": 17.0}, points=21)
    assert out["region"]["kind"] == "sphere" and out["fixed"] == {"C": 17.0}
    assert 0.0 < out["fraction_inside"] < 1.0
    assert_allclose(out["fraction_inside"], np.mean([p["inside"] for p in out["points"]]),
                    rtol=1e-15)
    radius = out["region"]["radius"]
    for p in out["points"][::7]:
        settings = {"A": p["x"], "B": p["y"], "C": 17.0}
        expect = True
        for r, (field, limit) in {"Strength": ("lower", 77.0), "Haze": ("upper", 62.0)}.items():
            pi = predict(fits[r], settings)["pi"]
            assert_allclose(p["pi"][r], pi, rtol=1e-12)
            expect &= pi[0] >= limit if field == "lower" else pi[1] <= limit
        assert p["inside"] == expect
        # C fixed at 17 is 0.4 coded: every mapped point lies in the sphere with it
        a, b = p["coded"]["A"], p["coded"]["B"]
        assert a * a + b * b + 0.4**2 <= radius**2 + 1e-9
    assert len(out["design_points"]) == 20
    json.dumps(out, allow_nan=False)


def test_tighter_limits_shrink_the_design_space(fits):
    loose = design_space(fits, {"Strength": {"lower": 70.0}}, "A", "B", points=21)
    tight = design_space(fits, {"Strength": {"lower": 78.0}}, "A", "B", points=21)
    both = design_space(fits, {"Strength": {"lower": 78.0}, "Haze": {"upper": 61.0}}, "A", "B",
                        points=21)
    assert loose["fraction_inside"] > tight["fraction_inside"] >= both["fraction_inside"]
    assert loose["fixed"] == {"C": 15.0}   # unnamed factors at the centre
    tight_in = {(p["x"], p["y"]) for p in tight["points"] if p["inside"]}
    assert all((p["x"], p["y"]) in tight_in for p in both["points"] if p["inside"])
    impossible = design_space(fits, {"Strength": {"lower": 500.0}}, "A", "B", points=11)
    assert impossible["fraction_inside"] == 0.0
