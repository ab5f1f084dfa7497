"""ANOVA with centre points: Residual split into curvature and the rest, and into lack of fit
and pure error; rows add up to the total; every F names its denominator.

Reference: statsmodels anova_lm (formula API), computed in the test, on
- the fitted model (term F against its residual),
- the same model with a centre-point indicator added (curvature SS, F, p; the residual after
  curvature),
- that augmented model against the cell-means model (lack of fit after curvature against pure
  error).
"""

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from helpers import ccd, frame_from, full_factorial
from numpy.testing import assert_allclose
from statsmodels.stats.anova import anova_lm

from app.analysis import Factor, FitSpec, analyse
from app.analysis.anova import anova_table, centre_runs
from app.analysis.design import describe_design, setting_groups
from app.analysis.fit import least_squares
from app.analysis.terms import model_matrix, resolve_terms

NAMES = ("A", "B", "C", "D")
INTERACTIONS = ("A:B", "A:C", "A:D", "B:C", "B:D", "C:D")


def _data():
    # a 2^4 with three centre points (19 runs); the centre runs sit 1.2 above the plane
    coded = np.vstack([full_factorial(4), np.zeros((3, 4))])
    rng = np.random.default_rng(4)
    y = 60 + 2.5 * coded[:, 0] - 1.5 * coded[:, 1] + coded[:, 0] * coded[:, 2]
    y = y + 0.6 * rng.normal(size=19)
    y[16:] += 1.2
    return coded, y


def _table(coded, y):
    terms = resolve_terms("interaction", None, NAMES, True)
    x = model_matrix(coded, terms)
    ls = least_squares(x, y)
    cols = [(t.name(NAMES), [1 + i]) for i, t in enumerate(terms)]
    return anova_table(ls, x, y, cols, [], setting_groups(coded),
                       centre=centre_runs(describe_design(coded), coded))


def assert_rows_add_up(rows):
    by = {r["source"]: r for r in rows}
    parents = {r["part_of"] for r in rows if r["part_of"]}
    for parent in parents:
        children = [r for r in rows if r["part_of"] == parent]
        assert len(children) >= 2, parent
        assert sum(r["df"] for r in children) == by[parent]["df"], parent
        assert_allclose(sum(r["sum_sq"] for r in children), by[parent]["sum_sq"], rtol=1e-10)
    assert "Total (corrected)" in parents


def test_curvature_split_matches_statsmodels_and_adds_up():
    # Before the fix the curvature SS also stayed inside Residual and its F used a mean square
    # the table did not show (and anova_table had no centre-point split at all).
    coded, y = _data()
    rows = _table(coded, y)
    by = {r["source"]: r for r in rows}
    # lower-case names in the formula: patsy reserves C( )
    frame = pd.DataFrame(coded, columns=[n.lower() for n in NAMES]).assign(
        Y=y, centre=centre_runs(describe_design(coded), coded).astype(float),
        cell=[str(s) for s in setting_groups(coded)])
    formula = "Y ~ " + " + ".join(NAMES + INTERACTIONS).lower()
    fitted = smf.ols(formula, frame).fit()
    augmented = smf.ols(formula + " + centre", frame).fit()
    cells = smf.ols("Y ~ C(cell)", frame).fit()
    plain_ref = anova_lm(fitted, typ=2)
    aug_ref = anova_lm(augmented, typ=2)
    lof_ref = anova_lm(augmented, cells)

    assert_allclose(by["Residual"]["sum_sq"], plain_ref.loc["Residual", "sum_sq"], rtol=1e-10)
    assert by["Residual"]["df"] == 8
    for col, key in (("sum_sq", "sum_sq"), ("F", "f_value"), ("PR(>F)", "p_value")):
        assert_allclose(by["Curvature (centre points)"][key], aug_ref.loc["centre", col],
                        rtol=1e-9)
    assert_allclose(by["Residual after curvature"]["sum_sq"], aug_ref.loc["Residual", "sum_sq"],
                    rtol=1e-10)
    assert by["Residual after curvature"]["df"] == aug_ref.loc["Residual", "df"] == 7
    assert_allclose(by["Lack of fit"]["f_value"], lof_ref.loc[1, "F"], rtol=1e-9)
    assert_allclose(by["Lack of fit"]["p_value"], lof_ref.loc[1, "Pr(>F)"], rtol=1e-9)
    assert_allclose(by["Pure error"]["sum_sq"], cells.ssr, rtol=1e-10)
    for term in ("A", "B", "A:C"):
        assert_allclose(by[term]["f_value"], plain_ref.loc[term.lower(), "F"], rtol=1e-9)
    assert_rows_add_up(rows)
    assert by["Curvature (centre points)"]["f_denominator"] == "Residual after curvature"
    assert by["Lack of fit"]["f_denominator"] == "Pure error"
    assert by["A"]["f_denominator"] == "Residual" and by["Model"]["f_denominator"] == "Residual"
    assert by["Lack of fit"]["part_of"] == "Residual after curvature"
    assert by["Residual"]["f_value"] != by["Residual"]["f_value"]  # NaN: no F on a residual


def test_response_surface_rows_add_up_without_curvature():
    # CCD: no curvature row (squares are in the model); lack of fit + pure error = Residual
    coded = ccd(3, 1.682, 6)
    rng = np.random.default_rng(0)
    y = 50 + 3 * coded[:, 0] - 2 * coded[:, 2] ** 2 + rng.normal(size=20)
    terms = resolve_terms("quadratic", None, NAMES[:3], True)
    x = model_matrix(coded, terms)
    ls = least_squares(x, y)
    cols = [(t.name(NAMES[:3]), [1 + i]) for i, t in enumerate(terms)]
    rows = anova_table(ls, x, y, cols, [], setting_groups(coded),
                       centre=centre_runs(describe_design(coded), coded))
    assert "Curvature (centre points)" not in {r["source"] for r in rows}
    assert_rows_add_up(rows)
    assert {r["source"]: r["part_of"] for r in rows}["Pure error"] == "Residual"


def test_engine_anova_adds_up_with_centre_points():
    coded, y = _data()
    spec = FitSpec(response="Y", factors=tuple(Factor(n) for n in NAMES), model="interaction")
    rows = list(analyse(frame_from(coded, y), spec).anova)
    assert_rows_add_up(rows)
