"""Diagnostic statistics against published values and scipy/statsmodels cross-checks.

Sources: tests/data/reference/diagnostics_reference_values.json (R nortest / R Box.test /
Julia HypothesisTests values, NIST e-Handbook GEAR), GEAR.DAT, and scipy/statsmodels on the
same arrays where they compute the same statistic.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from helpers import REFERENCE, load_json
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.sandbox.stats.runs import runstest_1samp
from statsmodels.stats.diagnostic import acorr_ljungbox, het_breuschpagan
from statsmodels.stats.outliers_influence import OLSInfluence

from app.analysis.checks.normality import anderson_darling
from app.analysis.checks.run_order import ljung_box, runs_distribution, runs_test
from app.analysis.checks.variance import bartlett, breusch_pagan, brown_forsythe
from app.analysis.fit import least_squares
from app.analysis.residuals import residual_set

REF = load_json("diagnostics_reference_values.json")


@pytest.mark.parametrize("case", ["x", "x**2", "log(x**2)", "exp(-x**2)"])
def test_anderson_darling_matches_r_nortest(case):
    # source: diagnostics_reference_values.json anderson_darling (R nortest::ad.test values)
    x = np.array(REF["anderson_darling"]["x"])
    data = {"x": x, "x**2": x**2, "log(x**2)": np.log(x**2), "exp(-x**2)": np.exp(-(x**2))}[case]
    ad = anderson_darling(data)
    a2, p = ad.statistic, ad.pvalue
    ref = REF["anderson_darling"]["cases"][case]
    assert_allclose(a2, ref["ref_A2"], rtol=1e-10)
    assert_allclose(p, ref["ref_p"], rtol=1e-8)
    # scipy cross-check: scipy.stats.anderson reports the unmodified A²
    assert_allclose(a2, stats.anderson(data, dist="norm", method="interpolate").statistic,
                    rtol=1e-10)


def _macrodata():
    d = sm.datasets.macrodata.load_pandas().data
    y = 400 * np.diff(np.log(d["realinv"].to_numpy()))
    g = 400 * np.diff(np.log(d["realgdp"].to_numpy()))
    x = np.column_stack([np.ones(len(y)), g, d["realint"].to_numpy()[:-1]])
    return x, y


def test_macrodata_regression_anderson_darling_and_ljung_box_match_r():
    # source: diagnostics_reference_values.json macrodata_regression (R lm, ad.test, Box.test)
    x, y = _macrodata()
    ls = least_squares(x, y)
    ref = REF["macrodata_regression"]
    assert_allclose(ls.coef, ref["params_R"], rtol=1e-10)
    ad = anderson_darling(ls.residuals)
    a2, p = ad.statistic, ad.pvalue
    ad = ref["ad_R"]["all_resid"]
    assert_allclose([a2, p], [ad["statistic"], ad["pvalue"]], rtol=1e-8)
    ad = anderson_darling(ls.residuals[:20])
    a2, p = ad.statistic, ad.pvalue
    ad = ref["ad_R"]["first20"]
    assert_allclose([a2, p], [ad["statistic"], ad["pvalue"]], rtol=1e-8)
    res = ljung_box(ls.residuals, 4)
    q, qp = res.statistic, res.pvalue
    lb = ref["ljung_box_R"]["lag4"]
    assert_allclose([q, qp], [lb["Q"], lb["p"]], rtol=1e-9)
    n = len(ls.residuals)
    res = ljung_box(ls.residuals, min(40, n // 2 - 2))
    q, qp = res.statistic, res.pvalue
    lb = ref["ljung_box_R"]["default_lag"]
    assert_allclose([q, qp], [lb["Q"], lb["p"]], rtol=1e-9)
    q = ljung_box(ls.residuals[:30], 13).statistic
    assert_allclose(q, ref["ljung_box_R"]["first30_lag13"]["Q"], rtol=1e-9)


def test_ljung_box_matches_julia_and_statsmodels():
    # source: diagnostics_reference_values.json ljung_box_julia (HypothesisTests.jl expected Q)
    lj = REF["ljung_box_julia"]
    h1 = np.array(lj["sim_data_h1"])
    res = ljung_box(h1, 12)
    q, p = res.statistic, res.pvalue
    assert_allclose(q, lj["expected"]["LjungBox_h1_lag12"]["Q"], rtol=1e-10)
    assert_allclose(p, lj["expected"]["LjungBox_h1_lag12"]["p"], rtol=1e-6)
    h0 = np.array(lj["sim_data_h0"])
    q = ljung_box(h0, 5).statistic
    assert_allclose(q, lj["expected"]["LjungBox_h0_lag5_dof2"]["Q"], rtol=1e-10)
    # statsmodels cross-check
    sm_q = acorr_ljungbox(h0, lags=[7], return_df=True)
    res7 = ljung_box(h0, 7)
    assert_allclose([res7.statistic, res7.pvalue],
                    [sm_q["lb_stat"].iloc[0], sm_q["lb_pvalue"].iloc[0]], rtol=1e-10)


def _gear():
    lines = (REFERENCE / "GEAR.DAT").read_text().splitlines()[25:]
    rows = [line.split() for line in lines if line.strip()]
    return np.array([float(r[0]) for r in rows]), np.array([float(r[1]) for r in rows])


def test_gear_brown_forsythe_and_bartlett_match_nist_handbook():
    # source: NIST/SEMATECH e-Handbook 1.3.5.10 (Levene, median-centred: W = 1.70592) and
    # 1.3.5.7 (Bartlett T = 20.78587), GEAR.DAT; values in diagnostics_reference_values.json
    y, batch = _gear()
    assert len(y) == 100
    bf = brown_forsythe(y, batch.astype(int))
    w, p, (df1, df2) = bf.statistic, bf.pvalue, bf.df
    assert (df1, df2) == (9, 90)
    assert_allclose(w, 1.70592, atol=5e-6)
    bt_ours = bartlett(y, batch.astype(int))
    t, tp, (tdf,) = bt_ours.statistic, bt_ours.pvalue, bt_ours.df
    assert tdf == 9
    assert_allclose(t, 20.78587, atol=5e-6)
    # scipy cross-checks on the same data
    groups = [y[batch == b] for b in np.unique(batch)]
    lev = stats.levene(*groups, center="median")
    assert_allclose([w, p], [lev.statistic, lev.pvalue], rtol=1e-10)
    bt = stats.bartlett(*groups)
    assert_allclose([t, tp], [bt.statistic, bt.pvalue], rtol=1e-10)


def test_runs_test_matches_julia_normal_approximation():
    # source: diagnostics_reference_values.json runs_test (HypothesisTests.jl, x = 1:1000)
    out = runs_test(np.arange(1.0, 1001.0), exact=False)
    assert out.statistic == 2
    assert_allclose(out.extras["z"], -31.575338477995764, rtol=1e-12)
    assert_allclose(out.pvalue, 8.052375336390931e-219, rtol=1e-8)


def test_runs_test_matches_statsmodels_sandbox():
    # statsmodels cross-check: runstest_1samp(correction=False), ties counted as below
    x = np.array([1] * 5 + [2] * 6 + [3] * 8, float)
    z_sm, p_sm = runstest_1samp(x, cutoff="median", correction=False)
    out = runs_test(x, exact=False)
    assert_allclose([out.extras["z"], out.pvalue], [z_sm, p_sm], rtol=1e-12)
    assert_allclose(out.extras["z"], -3.944254410803499, rtol=1e-12)


def test_exact_runs_distribution_matches_enumeration():
    # brute-force cross-check: every arrangement of 5 highs and 4 lows
    from itertools import combinations
    n1, n2 = 5, 4
    counts = {}
    for highs in combinations(range(n1 + n2), n1):
        s = np.zeros(n1 + n2, bool)
        s[list(highs)] = True
        r = 1 + int(np.sum(s[1:] != s[:-1]))
        counts[r] = counts.get(r, 0) + 1
    total = sum(counts.values())
    r, probs = runs_distribution(n1, n2)
    expected = np.array([counts.get(int(v), 0) / total for v in r])
    assert_allclose(probs, expected, atol=1e-13)


def test_breusch_pagan_matches_statsmodels():
    # statsmodels cross-check: het_breuschpagan(resid, [1, fitted]) (robust=True default)
    rng = np.random.default_rng(3)
    x = np.column_stack([np.ones(40), rng.normal(size=(40, 2))])
    y = x @ [1.0, 2.0, -1.0] + rng.normal(size=40) * (1 + 0.5 * np.abs(x[:, 1]))
    ls = least_squares(x, y)
    bp = breusch_pagan(ls.residuals, ls.fitted)
    lm, p, (df,) = bp.statistic, bp.pvalue, bp.df
    sm_lm, sm_p, _, _ = het_breuschpagan(ls.residuals, np.column_stack([np.ones(40), ls.fitted]))
    assert df == 1
    assert_allclose([lm, p], [sm_lm, sm_p], rtol=1e-10)


def test_ols_and_influence_match_statsmodels():
    # statsmodels cross-check: OLS params/bse and OLSInfluence on a small n
    rng = np.random.default_rng(11)
    x = np.column_stack([np.ones(15), rng.normal(size=(15, 3))])
    y = x @ [1.0, 0.5, -2.0, 0.0] + rng.normal(size=15)
    y[4] += 4.0
    ls = least_squares(x, y)
    res = residual_set(ls)
    ols = sm.OLS(y, x).fit()
    infl = OLSInfluence(ols)
    assert_allclose(ls.coef, ols.params, rtol=1e-12)
    assert_allclose(ls.s * np.sqrt(np.diag(ls.xtx_inv)), ols.bse, rtol=1e-12)
    assert_allclose(res.leverage, infl.hat_matrix_diag, rtol=1e-12)
    assert_allclose(res.studentized, infl.resid_studentized_internal, rtol=1e-10)
    assert_allclose(res.deleted_studentized, infl.resid_studentized_external, rtol=1e-10)
    assert_allclose(res.cooks_distance, infl.cooks_distance[0], rtol=1e-10)
    assert_allclose(res.dffits, infl.dffits[0], rtol=1e-10)
    press = np.sum((ls.residuals / (1 - res.leverage)) ** 2)
    assert_allclose(press, np.sum(infl.resid_press**2), rtol=1e-10)
