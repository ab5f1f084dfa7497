"""Prediction intervals at setpoints: coverage by simulation, and the vectorised evaluator
against app.analysis.predict."""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from app.analysis import Factor, FitSpec, analyse, predict
from app.analysis.optimize import Surface

from .fits import ccd, fit, quadratic_truth

B0, B, BB = 50.0, [2.0, -3.0], [[-2.0, 0.75], [0.75, -1.0]]   # 1.5 AB split in halves
SIGMA = 1.0
NEW_POINT = np.array([[0.5, -0.7]])


@pytest.mark.slow
def test_prediction_interval_covers_fresh_runs_about_95_percent():
    # 400 seeded replicates of a 13-run rotatable CCD from a known quadratic plus N(0, 1) noise;
    # each is fitted with app.analysis.analyse and one fresh run is drawn at a new point.
    # (About 10 s on two cores: analyse runs every residual check on each replicate.)
    rng = np.random.default_rng(20240611)
    design = ccd(2, 2**0.5, 5)
    mean = quadratic_truth(design, B0, B, BB)
    mean_new = float(quadratic_truth(NEW_POINT, B0, B, BB)[0])
    frame = pd.DataFrame({"A": design[:, 0], "B": design[:, 1], "Y": mean},
                         index=pd.RangeIndex(1, len(mean) + 1, name="row"))
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B")), model="quadratic")
    reps, in_pi, in_ci = 400, 0, 0
    for _ in range(reps):
        frame["Y"] = mean + rng.normal(0.0, SIGMA, len(mean))
        p = predict(analyse(frame, spec), {"A": 0.5, "B": -0.7})
        fresh = mean_new + rng.normal(0.0, SIGMA)
        in_pi += p["pi"][0] <= fresh <= p["pi"][1]
        in_ci += p["ci"][0] <= mean_new <= p["ci"][1]
    # binomial tolerance: 3 standard errors of a proportion 0.95 over 400 trials = 0.0327
    tol = 3 * np.sqrt(0.95 * 0.05 / reps)
    assert abs(in_pi / reps - 0.95) <= tol
    assert abs(in_ci / reps - 0.95) <= tol


@pytest.fixture(scope="module")
def doc():
    rng = np.random.default_rng(7)
    design = ccd(2, 2**0.5, 5)
    y = quadratic_truth(design, B0, B, BB) + rng.normal(0.0, SIGMA, 13)
    return fit(design, y, levels={"A": (150.0, 170.0), "B": (2.0, 3.0)})


def test_vectorised_intervals_match_predict(doc):
    surface = Surface.from_result(doc, "Y")
    coded = np.array([[0.0, 0.0], [1.0, -1.0], [0.3, 1.2], [-1.4, 0.1]])
    iv = surface.intervals(coded)
    for n, (a, b) in enumerate(coded):
        p = predict(doc, {"A": 160 + 10 * a, "B": 2.5 + 0.5 * b})   # actual units
        assert_allclose(iv["predicted"][n], p["predicted"], rtol=1e-12)
        assert_allclose([iv["ci_low"][n], iv["ci_high"][n]], p["ci"], rtol=1e-12)
        assert_allclose([iv["pi_low"][n], iv["pi_high"][n]], p["pi"], rtol=1e-12)
    # the half-width of the PI is t(0.975, df) * s * sqrt(1 + x'Vx) (scipy t quantile)
    t = stats.t.ppf(0.975, doc["model"]["df_resid"])
    assert np.all(iv["pi_high"] - iv["pi_low"] > 2 * t * doc["model"]["s"])


def test_log_fit_back_transforms_like_predict():
    rng = np.random.default_rng(3)
    design = ccd(2, 2**0.5, 5)
    y = np.exp(quadratic_truth(design, 2.0, [0.2, -0.1], [[-0.1, 0], [0, -0.05]])
               + rng.normal(0, 0.05, 13))
    doc = fit(design, y, transform="log")
    surface = Surface.from_result(doc, "Y")
    iv = surface.intervals(np.array([[0.4, -0.2]]))
    p = predict(doc, {"A": 0.4, "B": -0.2})
    assert_allclose([iv["pi_low"][0], iv["predicted"][0], iv["pi_high"][0]],
                    [p["pi"][0], p["predicted"], p["pi"][1]], rtol=1e-12)
    # gradient through the back-transform against central differences of predict
    h = 1e-6
    fd = [(predict(doc, {"A": 0.4 + h, "B": -0.2})["predicted"]
           - predict(doc, {"A": 0.4 - h, "B": -0.2})["predicted"]) / (2 * h),
          (predict(doc, {"A": 0.4, "B": -0.2 + h})["predicted"]
           - predict(doc, {"A": 0.4, "B": -0.2 - h})["predicted"]) / (2 * h)]
    assert_allclose(surface.gradient(np.array([0.4, -0.2])), fd, rtol=1e-6)
