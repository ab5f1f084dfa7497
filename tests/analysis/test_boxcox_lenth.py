"""Box–Cox on the poisons data; effects and Lenth on the e-Handbook SPLETT3 and CATAPULT sets.

Sources: boxcox_poisons.json (Box & Cox 1964, lambda-hat about -0.75, recalled from memory),
ehandbook/SPLETT3.DAT (e-Handbook 5.6.1), ehandbook/CATAPULT.DAT (e-Handbook 5.4.7.2),
scipy.stats.boxcox_llf cross-check.
"""

import numpy as np
import pandas as pd
from helpers import dataplot_rows, load_json
from numpy.testing import assert_allclose
from scipy import stats

from app.analysis import Factor, FitSpec, analyse
from app.analysis.boxcox import boxcox_profile, profile_loglik
from app.analysis.lenth import lenth
from app.analysis.terms import block_columns


def _poisons_q():
    d = load_json("boxcox_poisons.json")
    y = np.array(d["y"])
    p_cols, _, _ = block_columns(np.array(d["poison"]).astype(str))
    t_cols, _, _ = block_columns(np.array(d["treat"]))
    x = np.column_stack([np.ones(len(y)), p_cols, t_cols])
    q, _ = np.linalg.qr(x)
    return y, q


def test_poisons_lambda_hat_near_minus_three_quarters():
    # source: Box & Cox (1964) via boxcox_poisons.json: lambda-hat about -0.75 for the additive
    # model (recalled from memory); they adopt the reciprocal, which must lie in the 95 % CI
    y, q = _poisons_q()
    res = boxcox_profile(y, q)
    assert_allclose(res.lambda_hat, -0.75, atol=0.1)
    assert res.ci[0] < -1.0 < res.ci[1] and res.ci[1] < 0.0
    assert res.suggestion == "inverse"


def test_profile_loglik_matches_scipy_for_intercept_only_model():
    # scipy cross-check: boxcox_llf is the profile log-likelihood with only a mean
    y = np.array(load_json("boxcox_poisons.json")["y"])
    q = np.ones((len(y), 1)) / np.sqrt(len(y))
    for lam in (-1.0, -0.5, 0.0, 0.5, 2.0):
        assert_allclose(profile_loglik(lam, y, q), stats.boxcox_llf(lam, y), rtol=1e-10)
    assert_allclose(boxcox_profile(y, q).lambda_hat, stats.boxcox(y)[1], atol=1e-4)


def _splett3():
    rows = dataplot_rows("ehandbook/SPLETT3.DAT", 25)
    return pd.DataFrame({"Turns": rows[:, 1], "Distance": rows[:, 2], "Gauge": rows[:, 3],
                         "Impedance": rows[:, 0], "Run": rows[:, 4].astype(int)},
                        index=pd.RangeIndex(1, 9))


def test_splett3_saturated_effects_and_lenth():
    # source: e-Handbook 5.6.1 (SPLETT3.DAT): effects X1 = 3.1025 and X2 = -0.8675 (recalled from
    # memory and recomputed by hand from the 8 responses below)
    frame = _splett3()
    spec = FitSpec(response="Impedance",
                   factors=(Factor("Turns"), Factor("Distance"), Factor("Gauge")),
                   run_order="Run", model="full")
    result = analyse(frame, spec)
    assert result.design.kind == "two_level_full_factorial"
    assert result.fit["df_resid"] == 0
    effects = {e.term: e.effect for e in result.effects}
    assert_allclose(effects["Turns"], 3.1025, atol=1e-12)
    assert_allclose(effects["Distance"], -0.8675, atol=1e-12)
    y = frame["Impedance"].to_numpy()
    signs = frame[["Turns", "Distance", "Gauge"]].to_numpy()
    # hand contrasts: effect = mean(y at +) - mean(y at -) of the sign column
    for term, col in (("Gauge", signs[:, 2]), ("Turns:Distance", signs[:, 0] * signs[:, 1]),
                      ("Turns:Distance:Gauge", signs.prod(axis=1))):
        assert_allclose(effects[term], y[col > 0].mean() - y[col < 0].mean(), atol=1e-12)
    # Lenth by hand on the 7 effects: s0 = 1.5 median|c|, PSE = 1.5 median of |c| < 2.5 s0
    c = np.abs(np.array(list(effects.values())))
    s0 = 1.5 * np.median(c)
    pse = 1.5 * np.median(c[c < 2.5 * s0])
    assert_allclose(result.lenth["pse"], pse, rtol=1e-12)
    assert_allclose(result.lenth["me"], stats.t.ppf(0.975, 7 / 3) * pse, rtol=1e-12)
    assert_allclose(result.lenth["sme"], stats.t.ppf((1 + 0.95 ** (1 / 7)) / 2, 7 / 3) * pse,
                    rtol=1e-12)
    assert "Turns" in result.lenth["suggested_terms"]
    for check in result.checks:
        assert check.verdict == "not_applicable", check.id
        assert check.message.startswith("not applicable:")
        if check.id not in ("curvature",):
            assert "saturated" in check.message, check.id
    assert any("Saturated design" in s for s in result.suggestions)
    assert [p["term"] for p in result.half_normal][-1] == "Turns"


def test_lenth_textbook_constants():
    # Lenth (1989): with all effects equal in size, PSE = 1.5 * |c| (no trimming happens)
    res = lenth(np.array([2.0, -2.0, 2.0, 2.0, -2.0, 2.0, 2.0]))
    assert_allclose(res.pse, 3.0, rtol=1e-12)
    assert_allclose(res.df, 7 / 3, rtol=1e-12)


def test_catapult_fraction_with_centre_points():
    # source: e-Handbook 5.4.7.2 (CATAPULT.DAT): a 2^(5-1) with 4 centre points; the e-Handbook
    # lists it as resolution V (X5 = X1 X2 X3 X4) with centre points at both band counts
    rows = dataplot_rows("ehandbook/CATAPULT.DAT", 50)
    names = ("Height", "Start", "Bands", "Length", "Stop")
    frame = pd.DataFrame({n: rows[:, 6 + j] for j, n in enumerate(names)} | {"Distance": rows[:, 0],
                         "Seq": rows[:, 11].astype(int)}, index=pd.RangeIndex(1, 21))
    spec = FitSpec(response="Distance", factors=tuple(Factor(n) for n in names), run_order="Seq",
                   model="interaction")
    result = analyse(frame, spec)
    # the 'centre' runs have Bands at ±1, so not pure centres
    assert result.design.kind == "general"
    spec_lin = FitSpec(response="Distance", factors=tuple(Factor(n) for n in names),
                       run_order="Seq")
    cube = frame.iloc[:16]
    res16 = analyse(cube, spec_lin)
    assert res16.design.kind == "two_level_fractional_factorial"
    assert res16.design.resolution == 5
    y = cube["Distance"].to_numpy()
    for e in res16.effects:
        col = cube[e.term].to_numpy()
        assert_allclose(e.effect, y[col > 0].mean() - y[col < 0].mean(), atol=1e-12)
    assert result.check("lack_of_fit").verdict != "not_applicable"
