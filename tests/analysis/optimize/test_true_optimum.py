"""Maximize and minimize find the optimum of the prediction itself, checked independently.

Reference optima are computed here without the project's search: scipy.optimize on a plain
statsmodels OLS fit of the same quadratic model, a brute-force grid, or the stationary point
solved from the OLS coefficients with numpy.
"""

import io
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import optimize

from app.analysis import Factor, FitSpec, Thresholds, analyse, predict
from app.analysis.optimize import propose, single_goal
from app.demo_data import CCD_ALPHA, rsm_study
from app.ingest import read_upload, validate

from .fits import ROTATABLE_2, ccd, fit, hand_model, quadratic_truth

SCRATCHED_ROW = 3   # the demo's scratched panel, excluded as on the demo fit page


def _demo_document(response: str) -> dict:
    demo = rsm_study()
    table = validate(read_upload(demo.csv_bytes, demo.filename), demo.roles)
    factors = tuple(Factor(n, r.low, r.high, r.units) for n, r in demo.roles.items()
                    if r.role == "factor")
    spec = FitSpec(response=response, factors=factors, run_order="Run order", label="Panel ID",
                   model="quadratic", thresholds=Thresholds(),
                   exclusions=((SCRATCHED_ROW, "panel scratched"),))
    return analyse(table.frame, spec).to_dict()


def _independent_optimum(response: str, sense: str) -> tuple[np.ndarray, float, dict]:
    """Independent: statsmodels OLS of the full quadratic in coded units on the raw CSV, then
    scipy.optimize (SLSQP, many starts) inside the ball of radius alpha. Returns the coded point,
    the predicted value and the OLS coefficients by name."""
    demo = rsm_study()
    frame = pd.read_csv(io.BytesIO(demo.csv_bytes))
    frame = frame.drop(index=SCRATCHED_ROW - 1)   # file rows count from 1
    names = [n for n, r in demo.roles.items() if r.role == "factor"]
    x = np.column_stack([(frame[n] - (demo.roles[n].low + demo.roles[n].high) / 2)
                         / ((demo.roles[n].high - demo.roles[n].low) / 2) for n in names])

    def columns(x):
        x = np.atleast_2d(x)
        a, b, c = x.T
        return np.column_stack([np.ones(len(x)), a, b, c, a * b, a * c, b * c, a**2, b**2, c**2])

    beta = sm.OLS(frame[response].to_numpy(), columns(x)).fit().params
    sign = -1.0 if sense == "maximize" else 1.0

    def f(z):
        return sign * float((columns(z) @ beta)[0])

    ball = {"type": "ineq", "fun": lambda z: CCD_ALPHA**2 - z @ z}
    rng = np.random.default_rng(7)
    best = None
    for start in rng.uniform(-1, 1, (30, 3)):
        res = optimize.minimize(f, start, method="SLSQP", constraints=[ball],
                                options={"ftol": 1e-14, "maxiter": 500})
        if best is None or res.fun < best.fun:
            best = res
    return best.x, sign * best.fun, dict(zip(
        ["b0", "a", "b", "c", "ab", "ac", "bc", "aa", "bb", "cc"], beta, strict=True))


def _coded(out) -> np.ndarray:
    return np.array(list(out["optimum"]["coded"].values()))


@pytest.fixture(scope="module")
def hardness():
    return _demo_document("Hardness")


def test_demo_maximize_is_the_stationary_point_and_matches_an_independent_fit(hardness):
    out = propose({"Hardness": hardness}, {"Hardness": {"goal": "maximize"}})
    ref_x, ref_y, beta = _independent_optimum("Hardness", "maximize")
    # independent: stationary point b + 2Bx = 0 from the statsmodels coefficients
    b = np.array([beta["a"], beta["b"], beta["c"]])
    big_b = np.array([[beta["aa"], beta["ab"] / 2, beta["ac"] / 2],
                      [beta["ab"] / 2, beta["bb"], beta["bc"] / 2],
                      [beta["ac"] / 2, beta["bc"] / 2, beta["cc"]]])
    stationary = np.linalg.solve(big_b, -b / 2)
    assert np.all(np.linalg.eigvalsh(big_b) < 0)                 # a maximum ...
    assert stationary @ stationary < CCD_ALPHA**2                # ... inside the sphere
    assert out["region"]["shape"] == "sphere"                    # rotatable, despite the exclusion
    assert_allclose(out["region"]["radius"], CCD_ALPHA, rtol=1e-9)
    assert_allclose(_coded(out), stationary, atol=1e-8)
    assert_allclose(_coded(out), ref_x, atol=1e-5)
    assert_allclose(out["optimum"]["predicted"]["Hardness"], ref_y, rtol=1e-9)
    check = out["check"]
    assert check["status"] == "agrees" and out["grid_check"]["agrees"]
    assert check["proposal"]["from"] == "canonical analysis"
    assert check["methods"]["canonical"]["applies"]
    assert check["gradient_norm"] < 1e-8 * check["spread"]
    assert max(abs(v) for v in out["optimum"]["gradient"]["Hardness"].values()) < 1e-8
    # the old failure: d saturated at the observed maximum; now d = 1 only at the optimum
    assert out["goal_met_set"] is None
    assert_allclose(out["goals"]["Hardness"]["upper"], ref_y, rtol=1e-9)
    json.dumps(out, allow_nan=False)


def test_demo_minimize_lies_on_the_sphere_and_matches_an_independent_fit(hardness):
    out = propose({"Hardness": hardness}, {"Hardness": {"goal": "minimize"}})
    ref_x, ref_y, _ = _independent_optimum("Hardness", "minimize")
    assert_allclose(_coded(out), ref_x, atol=1e-4)
    assert_allclose(out["optimum"]["predicted"]["Hardness"], ref_y, rtol=1e-8)
    assert_allclose(np.linalg.norm(_coded(out)), CCD_ALPHA, rtol=1e-7)   # on the boundary
    check = out["check"]
    assert check["status"] == "agrees" and "on the sphere" in check["active_constraints"]
    assert not check["methods"]["canonical"]["applies"]
    assert check["gradient_norm"] < 1e-4 * check["spread"]             # tangential part only
    assert check["methods"]["dense"]["value"] >= out["optimum"]["predicted"]["Hardness"]


def test_minimize_finds_an_interior_minimum():
    # y = 5 + (A - 0.3)^2 + 2 (B + 0.2)^2 written out: minimum 5 at (0.3, -0.2)
    doc = hand_model({"A": -0.6, "B": 0.8, "A^2": 1.0, "B^2": 2.0}, 5.0 + 0.09 + 0.08,
                     levels={"A": (10.0, 20.0), "B": (1.0, 3.0)})
    out = single_goal(doc, "minimize")
    assert_allclose(_coded(out), [0.3, -0.2], atol=1e-9)
    assert_allclose(out["optimum"]["predicted"], 5.0, atol=1e-9)
    assert out["check"]["status"] == "agrees"


SADDLE = {"A": 0.4, "B": 0.3, "A:B": 0.8, "A^2": 0.6, "B^2": -1.0}


def _brute(doc, edge: str, sense: str):
    """Independent: the hand-written polynomial on a 1201 x 1201 grid (cube), or on 20 000
    directions of the circle plus a 401 x 401 grid inside it (sphere of radius sqrt 2)."""
    def y(a, b):
        return (7.0 + SADDLE["A"] * a + SADDLE["B"] * b + SADDLE["A:B"] * a * b
                + SADDLE["A^2"] * a**2 + SADDLE["B^2"] * b**2)
    if edge == "cube":
        a, b = np.meshgrid(np.linspace(-1, 1, 1201), np.linspace(-1, 1, 1201))
        a, b = a.ravel(), b.ravel()
    else:
        t = np.linspace(0, 2 * np.pi, 20_000, endpoint=False)
        ga, gb = np.meshgrid(np.linspace(-1.5, 1.5, 401), np.linspace(-1.5, 1.5, 401))
        inside = ga**2 + gb**2 <= 2.0
        a = np.concatenate([np.sqrt(2) * np.cos(t), ga[inside]])
        b = np.concatenate([np.sqrt(2) * np.sin(t), gb[inside]])
    values = y(a, b)
    i = int(np.argmax(values) if sense == "maximize" else np.argmin(values))
    return np.array([a[i], b[i]]), float(values[i])


@pytest.mark.parametrize("design, edge", [(None, "cube"), (ROTATABLE_2, "sphere")])
@pytest.mark.parametrize("sense", ["maximize", "minimize"])
def test_saddle_optimum_on_the_boundary_matches_a_brute_force_grid(design, edge, sense):
    doc = hand_model(SADDLE, 7.0, design=design)
    out = single_goal(doc, sense)
    ref_x, ref_y = _brute(doc, edge, sense)
    s = 1.0 if sense == "maximize" else -1.0
    # never worse than the grid's best, and not better than the grid allows (spacing 1/600)
    assert s * (out["optimum"]["predicted"] - ref_y) >= -1e-9
    assert s * (out["optimum"]["predicted"] - ref_y) <= 1e-4
    assert_allclose(_coded(out), ref_x, atol=5e-3)
    assert out["check"]["status"] == "agrees"
    assert not out["check"]["methods"]["canonical"]["applies"]
    assert "saddle" in out["check"]["methods"]["canonical"]["why"]
    assert out["check"]["active_constraints"]
    assert out["check"]["gradient_norm"] < 1e-4


@pytest.fixture(scope="module")
def noisy_ccd():
    rng = np.random.default_rng(5)
    design = ccd(2, 2**0.5, 5)
    y = quadratic_truth(design, 0.0, [1.0, -0.7], [[-0.4, 0.9], [0.9, 0.3]])
    return design, y + rng.normal(0, 0.05, len(design))


@pytest.mark.parametrize("sense", ["maximize", "minimize"])
def test_scaled_and_shifted_responses_give_the_same_settings(noisy_ccd, sense):
    design, y = noisy_ccd
    levels = {"A": (100.0, 140.0), "B": (0.5, 0.9)}
    settings = []
    for scaled in (y, 1000.0 * y, 1e6 + y):
        doc = fit(design, scaled, names=("A", "B"), levels=levels)
        out = propose({"Y": doc}, {"Y": {"goal": sense}})
        assert out["check"]["status"] == "agrees"
        settings.append(list(out["optimum"]["settings"].values()))
    assert_allclose(settings[1], settings[0], rtol=0, atol=1e-5 * 40)
    assert_allclose(settings[2], settings[0], rtol=0, atol=1e-5 * 40)


def test_desirability_maximize_limits_do_not_saturate(hardness):
    # two responses force the desirability path; Gloss kept within limits is met everywhere, so
    # D follows Hardness alone and its optimum must be Hardness's own maximum
    gloss = _demo_document("Gloss")
    alone = propose({"Hardness": hardness}, {"Hardness": {"goal": "maximize"}})
    both = propose({"Hardness": hardness, "Gloss": gloss},
                   {"Hardness": {"goal": "maximize"},
                    "Gloss": {"goal": "within", "lower": 0.0, "upper": 1000.0}})
    assert both["check"]["objective"] == "overall desirability D"
    assert_allclose(_coded(both), _coded(alone), atol=1e-3)
    assert_allclose(both["goals"]["Hardness"]["upper"],
                    alone["optimum"]["predicted"]["Hardness"], rtol=1e-9)
    assert both["goal_met_set"] is None
    assert both["check"]["status"] == "agrees"


def test_goal_met_over_a_set_is_reported_with_the_set(hardness):
    gloss = _demo_document("Gloss")
    goals = {"Hardness": {"goal": "maximize", "lower": 110.0, "upper": 130.0},
             "Gloss": {"goal": "within", "lower": 0.0, "upper": 1000.0}}
    out = propose({"Hardness": hardness, "Gloss": gloss}, goals)
    met = out["goal_met_set"]
    assert met is not None and 0 < met["fraction"] < 1 and met["points"] > 1
    assert "over a set" in met["statement"]
    assert out["optimum"]["desirability"] == 1.0
    # independent of the search: predict() at each example and at the proposal
    for settings in [*met["examples"], out["optimum"]["settings"]]:
        assert predict(hardness, settings)["predicted"] >= 130.0 - 1e-9
        coded = np.array([(v - c) / h for v, (c, h) in zip(
            settings.values(), [(160.0, 10.0), (25.0, 5.0), (1.0, 0.2)], strict=True)])
        assert coded @ coded <= CCD_ALPHA**2 + 1e-7
    for name, (lo, hi) in met["box"].items():
        assert lo <= out["optimum"]["settings"][name] <= hi


@pytest.mark.parametrize("sense", ["maximize", "minimize"])
def test_log_response_is_optimised_on_the_natural_scale(noisy_ccd, sense):
    design, y = noisy_ccd
    levels = {"A": (100.0, 140.0), "B": (0.5, 0.9)}
    doc = fit(design, np.exp(0.5 * y), names=("A", "B"), levels=levels, transform="log")
    out = single_goal(doc, sense)
    s = -1.0 if sense == "maximize" else 1.0

    # independent of the search: scipy.optimize (SLSQP, many starts) on predict() in the disc
    def f(z):
        settings = {"A": 120.0 + 20.0 * z[0], "B": 0.7 + 0.2 * z[1]}
        return s * predict(doc, settings)["predicted"]

    disc = {"type": "ineq", "fun": lambda z: 2.0 - z @ z}
    best = min((optimize.minimize(f, start, method="SLSQP", constraints=[disc],
                                  options={"ftol": 1e-14})
                for start in np.random.default_rng(2).uniform(-1, 1, (12, 2))),
               key=lambda r: r.fun)
    assert out["check"]["objective_scale"].startswith("model scale")
    assert out["check"]["status"] == "agrees"
    assert_allclose(out["optimum"]["predicted"], s * best.fun, rtol=1e-7)
    assert_allclose(_coded(out), best.x, atol=1e-4)
