"""Confirmation runs judged by the mean of m runs against the interval for the mean of m.

Reference: the prediction interval for the mean of m new observations at x,
    x'b ± t(1 − α/2, n − p) · s · sqrt(1/m + x'(X'X)⁻¹x),
Neter, Kutner, Nachtsheim & Wasserman, *Applied Linear Statistical Models* ("prediction of mean
of m new observations for given X_h"), and Montgomery, *Design and Analysis of Experiments* —
recalled from memory, not checked against a file. Each check below recomputes it independently
from a statsmodels OLS fit of the coded model matrix written out by hand in this file (numpy,
scipy), never from app.analysis; with m = 1 it must equal statsmodels' own observation interval
(get_prediction(...).summary_frame()).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats

from app.analysis import AnalysisError, predict
from app.analysis.confirm import ConfirmationRefused, judge_confirmation
from tests.analysis.optimize.fits import ccd, fit

NAMES = ("Temperature", "Time", "Catalyst")
LEVELS = {"Temperature": (150.0, 180.0), "Time": (20.0, 40.0), "Catalyst": (0.9, 1.3)}
RELEASED = {"Temperature": 165.0, "Time": 30.0, "Catalyst": 1.10}
AS_RUN = {"Temperature": 167.0, "Time": 29.0, "Catalyst": 1.12}   # the file


def _design_and_response(seed: int = 11) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    design = ccd(3, 1.682, 6)
    a, b, c = design.T
    y = (136.0 + 4.0 * a - 2.5 * b + 1.5 * c + 1.2 * a * b - 2.0 * a**2 - 1.0 * b**2
         - 0.6 * c**2 + rng.normal(0.0, 1.5, len(design)))
    return design, y


def _coded(settings: dict[str, float]) -> np.ndarray:
    return np.array([(settings[n] - sum(LEVELS[n]) / 2) / ((LEVELS[n][1] - LEVELS[n][0]) / 2)
                     for n in NAMES])


def _row(x: np.ndarray) -> np.ndarray:
    """Full quadratic in three coded factors written out: 1, A, B, C, AB, AC, BC, A², B², C²."""
    a, b, c = x.T if x.ndim == 2 else x
    return np.column_stack([np.ones_like(np.atleast_1d(a)), a, b, c, a * b, a * c, b * c,
                            a**2, b**2, c**2])


def _reference(y: np.ndarray, design: np.ndarray, settings: dict[str, float], m: int,
               level: float = 0.95):
    """(prediction, interval for the mean of m) by the published formula on a statsmodels fit."""
    xm = _row(design)
    ols = sm.OLS(y, xm).fit()
    x = _row(_coded(settings))[0]
    v = np.linalg.inv(xm.T @ xm)
    t = stats.t.ppf(1 - (1 - level) / 2, ols.df_resid)
    s = np.sqrt(ols.scale)
    centre = float(x @ ols.params)
    half = t * s * np.sqrt(1.0 / m + x @ v @ x)
    return centre, (centre - half, centre + half), ols, x


@pytest.fixture(scope="module")
def data():
    design, y = _design_and_response()
    return design, y, fit(design, y, names=NAMES, levels=LEVELS)


def _runs(values, settings=None, rows=None):
    rows = rows or list(range(1, len(values) + 1))
    sets = settings if isinstance(settings, list) else [settings or {}] * len(values)
    return [{"row": r, "settings": dict(s), "responses": {"Y": v}}
            for r, s, v in zip(rows, sets, values, strict=True)]


# (a) the interval itself ----------------------------------------------------------------------

@pytest.mark.parametrize("m", [1, 2, 3, 5])
def test_interval_for_the_mean_of_m_matches_the_published_formula(data, m):
    design, y, doc = data
    centre, (low, high), ols, x = _reference(y, design, AS_RUN, m)
    got = predict(doc, AS_RUN, m=m)
    assert got["m"] == m
    # Neter/Kutner et al. "mean of m new observations" (recalled from memory), recomputed above
    assert_allclose(got["predicted"], centre, rtol=1e-10)
    assert_allclose(got["pi"], [low, high], rtol=1e-10)
    if m == 1:
        # statsmodels' own single-observation interval
        frame = ols.get_prediction(x[None, :]).summary_frame(alpha=0.05)
        assert_allclose(got["pi"], [frame["obs_ci_lower"].iloc[0], frame["obs_ci_upper"].iloc[0]],
                        rtol=1e-10)


def test_interval_for_the_mean_narrows_towards_the_confidence_interval(data):
    # As m grows, 1/m → 0 and the interval tends to the CI of the mean response
    # (statsmodels' mean_ci at the same point).
    design, y, doc = data
    _, _, ols, x = _reference(y, design, AS_RUN, 1)
    frame = ols.get_prediction(x[None, :]).summary_frame(alpha=0.05)
    widths = [np.diff(predict(doc, AS_RUN, m=m)["pi"])[0] for m in (1, 2, 4, 10**9)]
    assert widths == sorted(widths, reverse=True)
    assert_allclose(predict(doc, AS_RUN, m=10**9)["pi"],
                    [frame["mean_ci_lower"].iloc[0], frame["mean_ci_upper"].iloc[0]], rtol=1e-8)


@pytest.mark.parametrize("m", [0, -1, 1.5, True])
def test_m_must_be_a_whole_number_of_at_least_one(data, m):
    with pytest.raises(AnalysisError, match="m \\(the number of future observations"):
        predict(data[2], AS_RUN, m=m)


# (b) the reported case --------------------------------------------------------------------------

def test_one_run_outside_the_single_pi_with_the_mean_inside_passes(data):
    # The issue: three runs, one low (133.2-like) outside the single-observation PI, their mean
    # inside the interval for the mean of three. Values are placed from the reference formula.
    design, y, doc = data
    centre, (low3, high3), _, _ = _reference(y, design, RELEASED, 3)
    _, (low1, high1), _, _ = _reference(y, design, RELEASED, 1)
    first = low1 - 0.3
    rest = (3 * centre - first) / 2          # mean of the three is the prediction itself
    assert rest < high1 and low3 <= centre <= high3
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([first, rest, rest]))
    r = out["responses"]["Y"]
    assert r["m"] == 3 and out["m"] == 3
    assert_allclose(r["mean"], centre, rtol=1e-12)
    assert_allclose(r["interval_for_mean"], [low3, high3], rtol=1e-10)
    assert_allclose(r["pi"], [low1, high1], rtol=1e-10)
    assert r["inside"] == [False, True, True] and r["outside_single_pi_rows"] == [1]
    assert r["verdict"] == "pass" and out["verdict"] == "pass"
    assert "mean of m future observations" in out["rule"] and "information" in out["rule"]


def test_mean_outside_the_interval_for_the_mean_fails_even_with_every_run_inside(data):
    # Three runs each inside the single-observation PI but all on the high side, so that their
    # mean is beyond the (narrower) interval for the mean of three (reference formula).
    design, y, doc = data
    _, (low3, high3), _, _ = _reference(y, design, RELEASED, 3)
    _, (low1, high1), _, _ = _reference(y, design, RELEASED, 1)
    value = (high3 + high1) / 2
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([value, value, value]))
    r = out["responses"]["Y"]
    assert r["inside"] == [True, True, True]
    assert r["verdict"] == "fail" and out["verdict"] == "fail"
    assert "outside the interval for the mean of 3" in r["reason"]


def test_interval_ends_count_as_inside(data):
    design, y, doc = data
    _, (low1, _), _, _ = _reference(y, design, RELEASED, 1)
    got = judge_confirmation({"Y": doc}, RELEASED, _runs([predict(doc, RELEASED)["pi"][0]]))
    assert got["responses"]["Y"]["verdict"] == "pass"
    assert_allclose(got["responses"]["Y"]["pi"][0], low1, rtol=1e-10)


# (c) settings read from the file -------------------------------------------------------------

def test_interval_is_computed_at_the_settings_run(data):
    design, y, doc = data
    centre, (low3, high3), _, _ = _reference(y, design, AS_RUN, 3)
    released_centre, _, _, _ = _reference(y, design, RELEASED, 3)
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([centre] * 3, AS_RUN))
    r = out["responses"]["Y"]
    assert_allclose(r["interval_for_mean"], [low3, high3], rtol=1e-10)
    assert_allclose(r["predicted"], centre, rtol=1e-10)
    assert abs(centre - released_centre) > 0.1            # the two points really differ here
    assert out["settings"] == RELEASED and out["settings_run"] == AS_RUN
    dev = out["deviations"]["Temperature"]
    # deviation 2 in natural units; half-range of 150..180 is 15, so 2/15 coded
    assert dev["deviation"] == pytest.approx(2.0)
    assert dev["deviation_coded"] == pytest.approx(2 / 15)
    assert out["deviations"]["Catalyst"]["deviation_coded"] == pytest.approx(0.02 / 0.2)
    assert out["deviations"]["Time"]["source"] == "file"
    assert out["settings_notes"] == ["The settings run were read from the file."]


def test_a_run_judged_at_the_run_point_can_pass_where_the_released_point_would_fail(data):
    # Mean equal to the prediction at the settings run, chosen outside the interval for the
    # mean at the released settings (both from the reference formula).
    design, y, doc = data
    _, (rel_low, rel_high), _, _ = _reference(y, design, RELEASED, 3)
    far = {"Temperature": 172.0, "Time": 27.0, "Catalyst": 1.15}
    far_centre, _, _, _ = _reference(y, design, far, 3)
    assert not rel_low <= far_centre <= rel_high
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([far_centre] * 3, far))
    assert out["verdict"] == "pass"


def test_without_factor_columns_the_released_settings_are_assumed_and_said(data):
    design, y, doc = data
    _, (low3, high3), _, _ = _reference(y, design, RELEASED, 2)
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([136.0, 136.5]))
    assert out["settings_run"] == RELEASED
    assert_allclose(out["responses"]["Y"]["interval_for_mean"], [low3, high3], rtol=1e-10)
    assert out["settings_notes"] == [
        "The file records no setting for Temperature, Time, Catalyst: the released value is "
        "assumed for them."]
    assert {d["source"] for d in out["deviations"].values()} == {"released"}


def test_runs_at_different_settings_are_judged_at_their_mean_settings(data):
    design, y, doc = data
    sets = [{**AS_RUN, "Temperature": 166.0}, {**AS_RUN, "Temperature": 168.0}, AS_RUN]
    _, (low3, high3), _, _ = _reference(y, design, AS_RUN, 3)   # mean of 166, 168, 167 = 167
    out = judge_confirmation({"Y": doc}, RELEASED, _runs([136.0] * 3, sets),
                             tolerance={"Temperature": 3.0})
    assert out["settings_run"]["Temperature"] == pytest.approx(167.0)
    assert_allclose(out["responses"]["Y"]["interval_for_mean"], [low3, high3], rtol=1e-10)
    assert ("The runs were made at different settings of Temperature; they are judged at the "
            "mean of the settings run.") in out["settings_notes"]
    assert [r["settings"]["Temperature"] for r in out["runs"]] == [166.0, 168.0, 167.0]


def test_a_factor_recorded_for_some_runs_only_names_the_row(data):
    sets = [AS_RUN, {**AS_RUN, "Time": None}]
    with pytest.raises(AnalysisError, match="Row 2: no value for factor 'Time'"):
        judge_confirmation({"Y": data[2]}, RELEASED, _runs([136.0, 136.0], sets))


# (d) tolerance ------------------------------------------------------------------------------

def test_deviation_beyond_the_tolerance_is_refused_naming_the_factor(data):
    with pytest.raises(ConfirmationRefused) as info:
        judge_confirmation({"Y": data[2]}, RELEASED, _runs([136.0] * 3, AS_RUN),
                           tolerance={"Temperature": 1.5, "Time": 2.0, "Catalyst": 0.05})
    assert info.value.factor == "Temperature"
    message = str(info.value)
    assert "'Temperature' was run at 167" in message and "released value is 165" in message
    assert "±1.5" in message and "Row 1" in message


def test_runs_differing_from_each_other_beyond_the_tolerance_are_refused(data):
    sets = [{**RELEASED, "Time": 29.0}, {**RELEASED, "Time": 31.5}]
    with pytest.raises(ConfirmationRefused, match="different settings of 'Time': 29 \\(row 1\\) "
                                                  "to 31.5 \\(row 2\\)") as info:
        judge_confirmation({"Y": data[2]}, RELEASED, _runs([136.0, 136.0], sets),
                           tolerance={"Time": 2.0})
    assert info.value.factor == "Time"


def test_deviation_within_the_tolerance_is_judged_and_shown(data):
    out = judge_confirmation({"Y": data[2]}, RELEASED, _runs([136.0] * 3, AS_RUN),
                             tolerance={"Temperature": 2.0, "Time": 1.0, "Catalyst": 0.02})
    assert out["deviations"]["Time"]["deviation"] == pytest.approx(-1.0)
    assert out["deviations"]["Time"]["tolerance"] == 1.0
    assert out["tolerance"] == {"Temperature": 2.0, "Time": 1.0, "Catalyst": 0.02}


# (e) units and offset ----------------------------------------------------------------------

@pytest.mark.parametrize("scale, offset", [(1000.0, 0.0), (1.0, 1e6), (0.001, -50.0)])
def test_verdict_does_not_depend_on_unit_or_offset(scale, offset):
    design, y = _design_and_response(seed=5)
    base = fit(design, y, names=NAMES, levels=LEVELS)
    moved = fit(design, scale * y + offset, names=NAMES, levels=LEVELS)
    _, (low1, high1), _, _ = _reference(y, design, AS_RUN, 1)
    _, (low3, high3), _, _ = _reference(y, design, AS_RUN, 3)
    sets = [
        [low1 - 0.2, (high1 + high3) / 2, (high1 + high3) / 2],      # one out, mean in/out
        [(low3 + high3) / 2] * 3,
        [high3 + 0.05, high3 + 0.05, high3 + 0.05],
        [low1 - 0.5, high1 + 0.5, (low3 + high3) / 2],
    ]
    for values in sets:
        a = judge_confirmation({"Y": base}, RELEASED, _runs(values, AS_RUN))
        b = judge_confirmation({"Y": moved}, RELEASED,
                               _runs([scale * v + offset for v in values], AS_RUN))
        assert a["verdict"] == b["verdict"]
        assert a["responses"]["Y"]["inside"] == b["responses"]["Y"]["inside"]
        assert_allclose(np.array(b["responses"]["Y"]["interval_for_mean"]),
                        scale * np.array(a["responses"]["Y"]["interval_for_mean"]) + offset,
                        rtol=1e-9)
    verdicts = {judge_confirmation({"Y": base}, RELEASED, _runs(v, AS_RUN))["verdict"]
                for v in sets}
    assert verdicts == {"pass", "fail"}      # the sets exercise both outcomes


# (f) a transformed response ------------------------------------------------------------------

def test_log_response_is_judged_on_the_model_scale():
    design, y = _design_and_response(seed=8)
    positive = np.exp(y / 40.0)
    doc = fit(design, positive, names=NAMES, levels=LEVELS, transform="log")
    centre, (low3, high3), _, _ = _reference(np.log(positive), design, AS_RUN, 3)
    # Three runs whose logs average just inside the upper end of the log-scale interval.
    logs = np.array([high3 - 0.3, high3 + 0.3, high3 - 0.01])
    values = np.exp(logs).tolist()
    out = judge_confirmation({"Y": doc}, RELEASED, _runs(values, AS_RUN))
    r = out["responses"]["Y"]
    assert r["transform"] == "log"
    assert_allclose(r["interval_for_mean_model_scale"], [low3, high3], rtol=1e-10)
    assert_allclose(r["interval_for_mean"], np.exp([low3, high3]), rtol=1e-10)
    # the judged mean is the geometric mean (mean of logs, back-transformed)
    assert_allclose(r["judged_mean"], np.exp(logs.mean()), rtol=1e-12)
    assert r["verdict"] == ("pass" if logs.mean() <= high3 else "fail") == "pass"
    # The arithmetic mean of the values lies above exp(high3) here: judging it on the original
    # scale would have failed a set whose logs agree with the model.
    assert r["mean"] > np.exp(high3)


def test_log_response_refuses_a_value_it_cannot_take():
    design, y = _design_and_response(seed=8)
    doc = fit(design, np.exp(y / 40.0), names=NAMES, levels=LEVELS, transform="log")
    with pytest.raises(AnalysisError, match="row 2 has -1"):
        judge_confirmation({"Y": doc}, RELEASED, _runs([1.0, -1.0]))


def test_a_fit_without_residual_df_cannot_pass():
    design = ccd(2, 2**0.5, 1)[:4]             # the 2² cube with A, B and AB: no residual df
    doc = fit(design, np.array([3.0, 5.0, 4.0, 9.0]), names=("Temperature", "Time"),
              model="interaction",
              levels={k: LEVELS[k] for k in ("Temperature", "Time")})
    released = {"Temperature": 165.0, "Time": 30.0}
    out = judge_confirmation({"Y": doc}, released, _runs([3.0]))
    assert out["verdict"] == "fail"
    assert out["responses"]["Y"]["reason"] == "the fit has no prediction interval to check against"
