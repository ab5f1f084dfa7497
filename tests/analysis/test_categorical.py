"""Categorical factors: sum-to-zero coding, one ANOVA row per term, per-level spread check,
predictions by level name, natural-units equation.

Every number is checked against statsmodels OLS fitted independently with patsy's Sum (effect)
coding on the same constructed data (``C(Supplier, Sum, levels=...)``), against scipy.stats.levene
(median-centred, i.e. Brown–Forsythe) for the spread check, and against numpy lstsq on a
hand-built effect-coded matrix for the column layout.
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.anova import anova_lm
from statsmodels.stats.outliers_influence import OLSInfluence

from app.analysis import AnalysisError, Factor, FitSpec, analyse, predict

LEVELS = ("Birch", "Alder", "Cedar")  # file order of first appearance, not sorted
SUPPLIER = Factor("Supplier", levels=LEVELS)
TEMP = Factor("Temp", low=150.0, high=170.0, units="degC")
TERMS = ("Supplier", "Temp", "Supplier:Temp", "Temp^2")
SM_LEVELS = "levels=['Birch', 'Alder', 'Cedar']"
SM_FORMULA = f"y ~ C(Supplier, Sum, {SM_LEVELS}) * xc + I(xc ** 2)"


def _frame(scale=1.0, shift=0.0):
    rng = np.random.default_rng(7)
    supplier, temp = [], []
    for _ in range(2):
        for s in LEVELS:
            for t in (150.0, 160.0, 170.0):
                supplier.append(s)
                temp.append(t)
    order = rng.permutation(len(temp))
    supplier = [supplier[i] for i in order]
    temp = np.array(temp)[order]
    x = (temp - 160.0) / 10.0
    effect = np.array([{"Birch": 2.0, "Alder": -1.0, "Cedar": -1.0}[s] for s in supplier])
    slope = np.array([{"Birch": 1.5, "Alder": 3.0, "Cedar": 2.0}[s] for s in supplier])
    y = 60 + effect + slope * x - 1.2 * x**2 + rng.normal(scale=0.5, size=len(x))
    frame = pd.DataFrame({"Supplier": pd.Series(supplier, dtype=object), "Temp": temp,
                          "y": y * scale + shift})
    frame.index = pd.RangeIndex(1, len(frame) + 1, name="row")
    return frame


def _spec(**kw):
    return FitSpec(response="y", factors=(SUPPLIER, TEMP), terms=TERMS, **kw)


def _statsmodels(frame):
    data = frame.assign(xc=(frame["Temp"] - 160.0) / 10.0)
    return smf.ols(SM_FORMULA, data=data).fit(), data


def _sm_name(column):
    """Our column name to patsy's: Supplier[Birch] -> C(Supplier, Sum, ...)[S.Birch]."""
    parts = []
    for piece in column.split(":"):
        if piece.startswith("Supplier["):
            parts.append(f"C(Supplier, Sum, {SM_LEVELS})[S.{piece[9:-1]}]")
        elif piece == "Temp":
            parts.append("xc")
        elif piece == "Temp^2":
            parts.append("I(xc ** 2)")
        else:
            parts.append(piece)
    return ":".join(parts)


@pytest.mark.parametrize(("scale", "shift"), [(1.0, 0.0), (1000.0, 0.0), (0.01, 250.0)])
def test_coefficients_and_anova_match_statsmodels_sum_coding(scale, shift):
    frame = _frame(scale, shift)
    result = analyse(frame, _spec())
    ref, _ = _statsmodels(frame)
    names = [c.term for c in result.coefficients]
    assert names == ["Intercept", "Supplier[Birch]", "Supplier[Alder]", "Temp",
                     "Supplier[Birch]:Temp", "Supplier[Alder]:Temp", "Temp^2"]
    for row in result.coefficients:
        assert_allclose(row.estimate, ref.params[_sm_name(row.term)], rtol=1e-9,
                        atol=1e-9 * scale)
        assert_allclose(row.std_error, ref.bse[_sm_name(row.term)], rtol=1e-8)
    # the project's ANOVA is adjusted (drop-one, Type III) SS in coded units: statsmodels'
    # anova_lm(typ=3) on the same coded, effect-coded parameterisation
    table = anova_lm(ref, typ=3)
    rows = {r["source"]: r for r in result.anova}
    for ours, theirs in [("Supplier", f"C(Supplier, Sum, {SM_LEVELS})"), ("Temp", "xc"),
                         ("Supplier:Temp", f"C(Supplier, Sum, {SM_LEVELS}):xc"),
                         ("Temp^2", "I(xc ** 2)")]:
        assert rows[ours]["df"] == table.loc[theirs, "df"]
        assert_allclose(rows[ours]["sum_sq"], table.loc[theirs, "sum_sq"], rtol=1e-8)
        assert_allclose(rows[ours]["f_value"], table.loc[theirs, "F"], rtol=1e-8)
        assert_allclose(rows[ours]["p_value"], table.loc[theirs, "PR(>F)"], rtol=1e-7)
    assert rows["Supplier"]["df"] == 2 and rows["Supplier:Temp"]["df"] == 2
    assert sum(1 for r in result.anova if r["source"].startswith("Supplier")) == 2
    assert_allclose(rows["Residual"]["sum_sq"], ref.ssr, rtol=1e-9)
    assert result.design.kind == "general"


def test_results_do_not_depend_on_units_or_offset():
    base = analyse(_frame(), _spec())
    moved = analyse(_frame(1000.0, 5e4), _spec())
    assert_allclose([r["f_value"] for r in moved.anova[1:-1]],
                    [r["f_value"] for r in base.anova[1:-1]], rtol=1e-7)
    for a, b in zip(base.checks, moved.checks, strict=True):
        assert a.id == b.id and a.verdict == b.verdict
        if a.p_value is not None and np.isfinite(a.p_value):
            assert_allclose(b.p_value, a.p_value, rtol=1e-6, atol=1e-12)


def test_columns_are_the_hand_built_effect_coding():
    """numpy lstsq on an effect-coded matrix written out by hand gives the same coefficients."""
    frame = _frame()
    s = frame["Supplier"].to_numpy()
    e1 = np.where(s == "Birch", 1.0, np.where(s == "Cedar", -1.0, 0.0))
    e2 = np.where(s == "Alder", 1.0, np.where(s == "Cedar", -1.0, 0.0))
    x = (frame["Temp"].to_numpy() - 160.0) / 10.0
    matrix = np.column_stack([np.ones_like(x), e1, e2, x, e1 * x, e2 * x, x**2])
    coef, *_ = np.linalg.lstsq(matrix, frame["y"].to_numpy(), rcond=None)
    result = analyse(frame, _spec())
    assert_allclose([c.estimate for c in result.coefficients], coef, rtol=1e-9, atol=1e-12)


def test_spread_check_over_the_levels_is_brown_forsythe():
    frame = _frame()
    result = analyse(frame, _spec())
    check = next(c for c in result.checks if c.id == "constant_variance_factor:Supplier")
    ref, _ = _statsmodels(frame)
    r = OLSInfluence(ref).resid_studentized_internal
    groups = [r[(frame["Supplier"] == lv).to_numpy()] for lv in LEVELS]
    assert_allclose(check.statistic, stats.levene(*groups, center="median").statistic,
                    rtol=1e-8)
    assert set(check.details["sd_by_level_studentized"]) == set(LEVELS)
    pattern = next(c for c in result.checks if c.id == "pattern_factor:Supplier")
    assert pattern.verdict == "not_applicable"  # every level is already fitted separately


def test_prediction_takes_a_level_name():
    frame = _frame()
    result = analyse(frame, _spec())
    ref, _ = _statsmodels(frame)
    at = pd.DataFrame({"Supplier": ["Alder"], "xc": [0.5]})
    expected = ref.get_prediction(at).summary_frame(alpha=0.05)
    got = predict(result.to_dict(), {"Supplier": "Alder", "Temp": 165.0})
    assert_allclose(got["predicted"], expected["mean"].iloc[0], rtol=1e-10)
    assert_allclose(got["ci"], [expected["mean_ci_lower"].iloc[0],
                                expected["mean_ci_upper"].iloc[0]], rtol=1e-10)
    assert_allclose(got["pi"], [expected["obs_ci_lower"].iloc[0],
                                expected["obs_ci_upper"].iloc[0]], rtol=1e-10)
    with pytest.raises(AnalysisError, match="must be one of its levels .Birch, Alder, Cedar."):
        predict(result.to_dict(), {"Supplier": "Oak", "Temp": 165.0})


def test_natural_units_equation_says_how_levels_enter():
    result = analyse(_frame(), _spec())
    eq = result.equation
    assert "Supplier[Birch]" in eq["actual"] and "Supplier[Alder]:Temp" in eq["actual"]
    assert "-1 at its last level 'Cedar'" in eq["note"]
    # the natural-units equation reproduces the fitted values at every run
    frame = _frame()
    terms = {t["term"]: t["coefficient"] for t in eq["actual_terms"]}
    s, temp = frame["Supplier"].to_numpy(), frame["Temp"].to_numpy()
    ind = {lv: np.where(s == lv, 1.0, np.where(s == "Cedar", -1.0, 0.0)) for lv in LEVELS[:2]}
    value = (terms["Intercept"] + terms["Temp"] * temp + terms["Temp^2"] * temp**2
             + sum(terms[f"Supplier[{lv}]"] * ind[lv]
                   + terms[f"Supplier[{lv}]:Temp"] * ind[lv] * temp for lv in LEVELS[:2]))
    assert_allclose(value, result.runs.fitted, rtol=1e-9)


def test_square_of_a_categorical_factor_is_refused_clearly():
    with pytest.raises(AnalysisError, match="'Supplier' is a categorical factor, so it has no "
                                            "square"):
        analyse(_frame(), FitSpec(response="y", factors=(SUPPLIER, TEMP),
                                  terms=("Supplier^2",)))
    # the named quadratic model squares only the continuous factor
    quad = analyse(_frame(), FitSpec(response="y", factors=(SUPPLIER, TEMP), model="quadratic"))
    assert quad.terms == ("Supplier", "Temp", "Supplier:Temp", "Temp^2")


def test_unknown_level_in_the_table_names_the_row():
    frame = _frame()
    frame.loc[4, "Supplier"] = "Oak"
    with pytest.raises(AnalysisError, match="row 4: 'Oak' is not one of its levels"):
        analyse(frame, _spec())


def test_spec_round_trip_keeps_levels_and_continuous_factors_unchanged():
    spec = _spec()
    assert FitSpec.from_dict(spec.to_dict()) == spec
    assert "levels" not in TEMP.to_dict()
    assert SUPPLIER.to_dict()["levels"] == list(LEVELS)


def test_predictions_and_profiler_with_a_categorical_factor():
    """predict_many takes level names (checked against statsmodels' get_prediction); the
    profiler traces the continuous factor and lists every level of the categorical one."""
    from app.analysis.profiler import PredictionError, predict_many, profile

    frame = _frame()
    doc = analyse(frame, _spec()).to_dict()
    ref, _ = _statsmodels(frame)
    got = predict_many(doc, [{"Supplier": "Cedar", "Temp": 155.0},
                             {"Supplier": "Birch", "Temp": 190.0}])["predictions"]
    expected = ref.get_prediction(pd.DataFrame({"Supplier": ["Cedar"], "xc": [-0.5]})
                                  ).summary_frame(alpha=0.05)
    assert_allclose(got[0]["predicted"], expected["mean"].iloc[0], rtol=1e-10)
    assert [p["inside_design_region"] for p in got] == [True, False]
    with pytest.raises(PredictionError, match="one of its levels") as bad:
        predict_many(doc, [{"Supplier": "Oak", "Temp": 160.0}])
    assert bad.value.field == "settings[0].Supplier"
    shown = profile(doc, {"Supplier": "Alder", "Temp": 165.0}, points=5)
    assert [t["factor"] for t in shown["traces"]] == ["Temp"]
    (levels,) = shown["levels"]
    assert [p["value"] for p in levels["points"]] == list(LEVELS)
    at_alder = next(p for p in levels["points"] if p["value"] == "Alder")
    assert_allclose(at_alder["predicted"], shown["point"]["predicted"], rtol=1e-12)
    assert profile(doc)["point"]["settings"] == {"Supplier": "Birch", "Temp": 160.0}
