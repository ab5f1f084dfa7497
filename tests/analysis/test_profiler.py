"""Predictions at chosen settings and profiler traces, checked point by point against
statsmodels' OLS ``get_prediction`` on a hand-built coded model matrix (an independent route to
the same intervals), on simulated central composite data (a known quadratic plus noise)."""

import json

import numpy as np
import pytest
import statsmodels.api as sm
from helpers import ccd, frame_from
from numpy.testing import assert_allclose

from app.analysis import Factor, FitSpec, analyse
from app.analysis.profiler import PredictionError, predict_many, profile

ALPHA = 1.682  # rotatable for 2^3 cube points: 8^(1/4), printed to three decimals


def _fit(scale=1.0, shift=0.0, transform="none"):
    x = ccd(3, ALPHA, 6)
    rng = np.random.default_rng(11)
    y = (50 + 3 * x[:, 0] - 2 * x[:, 1] + x[:, 0] * x[:, 1] - 2 * x[:, 2] ** 2
         + rng.normal(size=len(x)))
    frame = frame_from(x, y * scale + shift, order=rng.permutation(len(x)) + 1)
    frame["A"] = 150 + 20 * frame["A"]  # natural units, declared 130..170
    result = analyse(frame, FitSpec(response="Y", factors=(Factor("A", 130, 170), Factor("B"),
                                                           Factor("C")),
                                    model="quadratic", transform=transform))
    # Through JSON, as the stored document is read.
    return x, frame, json.loads(json.dumps(result.to_dict()))


def _row(a, b, c):
    return [1, a, b, c, a * b, a * c, b * c, a * a, b * b, c * c]


def _statsmodels(x, y):
    return sm.OLS(y, np.array([_row(*r) for r in x])).fit()


def test_predictions_match_statsmodels_and_say_where_they_lie():
    x, frame, doc = _fit()
    ols = _statsmodels(x, frame["Y"].to_numpy())
    asked = [{"A": 160.0, "B": -0.3, "C": 0.2}, {"A": 150, "B": 0, "C": 0},
             {"A": 200.0, "B": 1.5, "C": 0.0}]
    got = predict_many(doc, asked)
    assert [p["inside_design_region"] for p in got["predictions"]] == [True, True, False]
    assert got["region"]["shape"] == "sphere" and got["scale"] is None
    # A cube corner lies sqrt(3) = 1.732 coded units out, beyond the axial sphere (1.682), yet
    # the design ran there: a prediction at it is no extrapolation.
    corner = predict_many(doc, [{"A": 170.0, "B": 1.0, "C": -1.0}])["predictions"][0]
    assert corner["inside_design_region"] is True
    for p, s in zip(got["predictions"], asked, strict=True):
        coded = ((s["A"] - 150) / 20, s["B"], s["C"])
        frame_ = ols.get_prediction(np.array([_row(*coded)])).summary_frame(alpha=0.05)
        assert_allclose(p["predicted"], frame_["mean"].iloc[0], rtol=1e-10)
        assert_allclose(p["ci"], frame_[["mean_ci_lower", "mean_ci_upper"]].iloc[0], rtol=1e-10)
        assert_allclose(p["pi"], frame_[["obs_ci_lower", "obs_ci_upper"]].iloc[0], rtol=1e-10)
    ninety = predict_many(doc, asked[:1], level=0.90)["predictions"][0]
    frame_ = ols.get_prediction(np.array([_row(0.5, -0.3, 0.2)])).summary_frame(alpha=0.10)
    assert_allclose(ninety["ci"], frame_[["mean_ci_lower", "mean_ci_upper"]].iloc[0], rtol=1e-10)


def test_predictions_follow_the_units_of_the_response():
    """A response in other units (scaled, shifted) gives the same predictions in those units."""
    _, _, doc = _fit()
    _, _, moved = _fit(scale=1000.0, shift=-273.15)
    at = [{"A": 140.0, "B": 0.4, "C": -1.0}]
    base, other = predict_many(doc, at)["predictions"][0], predict_many(moved, at)["predictions"][0]
    for key in ("predicted", "ci", "pi"):
        assert_allclose(np.array(other[key]), np.array(base[key]) * 1000.0 - 273.15, rtol=1e-9)


def test_a_transformed_fit_is_back_transformed_and_says_so():
    x, frame, doc = _fit(shift=100.0, transform="log")
    ols = sm.OLS(np.log(frame["Y"].to_numpy()), np.array([_row(*r) for r in x])).fit()
    got = predict_many(doc, [{"A": 150.0, "B": 0.5, "C": 0.5}])
    p = got["predictions"][0]
    frame_ = ols.get_prediction(np.array([_row(0, 0.5, 0.5)])).summary_frame(alpha=0.05)
    assert_allclose(p["predicted"], np.exp(frame_["mean"].iloc[0]), rtol=1e-10)
    assert_allclose(p["pi"], np.exp(frame_[["obs_ci_lower", "obs_ci_upper"]].iloc[0]), rtol=1e-10)
    assert "natural log" in got["scale"] and "median" in got["scale"]


@pytest.mark.parametrize(("settings", "field", "words"), [
    ([{"A": 150, "B": 0}], "settings[0].C", "needs a value for the factor 'C'"),
    ([{"A": 150, "B": 0, "C": 0}, {"A": "hot", "B": 0, "C": 0}], "settings[1].A",
     "must be a finite number"),
    ([{"A": 150, "B": 0, "C": 0, "D": 1}], "settings[0].D", "'D' is not a factor"),
    ([{"A": float("nan"), "B": 0, "C": 0}], "settings[0].A", "finite"),
    ([], "settings", "non-empty list"),
    (["A=150"], "settings[0]", "must be an object"),
])
def test_bad_settings_are_refused_naming_the_item_and_factor(settings, field, words):
    _, _, doc = _fit()
    with pytest.raises(PredictionError, match=words.replace("(", r"\(")) as refused:
        predict_many(doc, settings)
    assert refused.value.field == field


def test_profiler_traces_pass_through_the_point_and_agree_with_predictions():
    x, frame, doc = _fit()
    ols = _statsmodels(x, frame["Y"].to_numpy())
    at = {"A": 155.0, "B": 0.25, "C": -0.5}
    got = profile(doc, at, points=11)
    assert [t["factor"] for t in got["traces"]] == ["A", "B", "C"]
    for trace in got["traces"]:
        # The sphere through the axial points: each trace spans ±alpha in coded units.
        span = (150 - 20 * ALPHA, 150 + 20 * ALPHA) if trace["factor"] == "A" else (-ALPHA, ALPHA)
        assert_allclose((trace["low"], trace["high"]), span, rtol=1e-12)
        through = [p for p in trace["points"] if p["value"] == at[trace["factor"]]]
        assert len(through) == 1
        assert_allclose(through[0]["predicted"], got["point"]["predicted"], rtol=1e-12)
        for p in trace["points"][::5]:
            settings = {**at, trace["factor"]: p["value"]}
            coded = ((settings["A"] - 150) / 20, settings["B"], settings["C"])
            frame_ = ols.get_prediction(np.array([_row(*coded)])).summary_frame(alpha=0.05)
            assert_allclose(p["predicted"], frame_["mean"].iloc[0], rtol=1e-10)
            assert_allclose(p["ci"], frame_[["mean_ci_lower", "mean_ci_upper"]].iloc[0],
                            rtol=1e-10)
    centre = profile(doc)
    assert centre["point"]["settings"] == {"A": 150.0, "B": 0.0, "C": 0.0}
    assert all(p["inside_design_region"] for t in centre["traces"] for p in t["points"])
