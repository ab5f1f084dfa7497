"""Engine behaviour: design recognition, terms, aliasing, exclusions, transforms, the result
document, predictions (statsmodels cross-check), reduction and blocks."""

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers import box_behnken3, ccd, frame_from, full_factorial
from numpy.testing import assert_allclose

from app.analysis import AnalysisError, Factor, FitSpec, Thresholds, analyse, predict
from app.analysis.design import describe_design
from app.analysis.terms import parse_term, resolve_terms

ABC = (Factor("A"), Factor("B"), Factor("C"))


def _ccd_frame(seed=0, alpha=1.682, centre=6):
    x = ccd(3, alpha, centre)
    rng = np.random.default_rng(seed)
    y = (50 + 3 * x[:, 0] - 2 * x[:, 1] + x[:, 0] * x[:, 1] - 2 * x[:, 2] ** 2
         + rng.normal(size=len(x)))
    return frame_from(x, y, order=rng.permutation(len(x)) + 1)


@pytest.mark.parametrize(("coded", "kind", "extra"), [
    (full_factorial(3), "two_level_full_factorial", {}),
    (np.vstack([full_factorial(3), np.zeros((3, 3))]), "two_level_full_factorial", {"n_centre": 3}),
    (ccd(3, 1.682, 6), "central_composite", {"ccd_type": "circumscribed", "rotatable": True}),
    (ccd(3, 1.0, 3), "central_composite", {"ccd_type": "face_centred", "alpha": 1.0}),
    (ccd(2, 1.414, 5) / 1.414, "central_composite", {"ccd_type": "inscribed"}),
    (box_behnken3(3), "box_behnken", {"n_centre": 3}),
])
def test_design_recognition(coded, kind, extra):
    info = describe_design(coded)
    assert info.kind == kind
    for key, value in extra.items():
        if isinstance(value, float):
            assert_allclose(getattr(info, key), value, rtol=1e-9)
        else:
            assert getattr(info, key) == value


def test_fraction_resolution_and_pure_error():
    base = full_factorial(3)
    half = np.column_stack([base, base.prod(axis=1)])  # 2^(4-1), D = ABC: resolution IV
    info = describe_design(np.vstack([half, half[:2], np.zeros((3, 4))]))
    assert info.kind == "two_level_fractional_factorial" and info.resolution == 4
    assert info.pure_error_df == 2 + 2
    rng = np.random.default_rng(1)
    assert describe_design(rng.uniform(-1, 1, (12, 3))).kind == "general"


def test_term_parsing_hierarchy_and_names_with_spaces():
    names = ("Feed rate", "C", "I")
    assert parse_term("Feed rate:C", names).name(names) == "Feed rate:C"
    assert parse_term("I^2", names).name(names) == "I^2"
    with pytest.raises(AnalysisError, match="'Q' is not a factor name"):
        parse_term("C:Q", names)
    terms = resolve_terms(None, ("C:I", "I^2"), names, hierarchy=True)
    assert [t.name(names) for t in terms] == ["C", "I", "C:I", "I^2"]
    terms = resolve_terms(None, ("C:I",), names, hierarchy=False)
    assert [t.name(names) for t in terms] == ["C:I"]


def test_aliasing_error_names_the_terms():
    base = full_factorial(3)
    half = np.column_stack([base, base.prod(axis=1)])  # D = ABC, so A:B is aliased with C:D
    y = np.random.default_rng(0).normal(size=8)
    frame = frame_from(half, y)
    spec = FitSpec(response="Y", factors=tuple(Factor(n) for n in "ABCD"), model=None,
                   terms=("A", "B", "C", "D", "A:B", "C:D"))
    with pytest.raises(AnalysisError, match=r"C:D is aliased with A:B in this design; drop one"):
        analyse(frame, spec)


def test_full_model_refused_for_response_surface_design():
    with pytest.raises(AnalysisError, match="two-level designs"):
        analyse(_ccd_frame(), FitSpec(response="Y", factors=ABC, model="full"))


def test_result_document_keys_and_determinism():
    frame = _ccd_frame()
    spec = FitSpec(response="Y", factors=ABC, run_order="order", model="quadratic",
                   exclusions=((3, "thermocouple failed"),))
    a = json.dumps(analyse(frame, spec).to_dict(), sort_keys=True)
    b = json.dumps(analyse(frame.copy(), FitSpec.from_dict(spec.to_dict())).to_dict(),
                   sort_keys=True)
    assert a == b
    doc = json.loads(a)
    for key in ("design", "terms", "coefficients", "anova", "fit", "runs", "checks", "effects",
                "lenth", "software_version", "spec", "equation", "transform", "boxcox",
                "suggestions", "factors", "response", "model"):
        assert key in doc
    assert doc["design"]["pure_error_df"] == 5
    run3 = doc["runs"][2]
    assert run3["row"] == 3 and run3["excluded"]
    assert run3["exclusion_reason"] == "thermocouple failed"
    assert run3["studentized"] is None and run3["fitted"] is not None
    assert doc["fit"]["n"] == 19
    ids = [c["id"] for c in doc["checks"]]
    for cid in ("normality", "run_order_autocorrelation", "run_order_randomness", "pattern_fitted",
                "pattern_factor:A", "constant_variance_fitted", "constant_variance_factor:C",
                "outliers", "influence", "lack_of_fit", "curvature"):
        assert cid in ids
    for c in doc["checks"]:
        assert c["verdict"] in ("pass", "review", "fail", "not_applicable")
        assert c["question"] and c["message"] and c["chart"]


def test_run_order_missing_makes_run_order_checks_not_applicable():
    result = analyse(_ccd_frame(), FitSpec(response="Y", factors=ABC, model="quadratic"))
    for cid in ("run_order_autocorrelation", "run_order_randomness"):
        c = result.check(cid)
        assert c.verdict == "not_applicable" and "run order was not recorded" in c.message


def test_thresholds_drive_verdicts():
    frame = _ccd_frame(seed=4)
    strict = analyse(frame, FitSpec(response="Y", factors=ABC, model="quadratic",
                                    thresholds=Thresholds(review=0.999, fail=0.998)))
    p = strict.check("normality").p_value
    expected = "fail" if p < 0.998 else "review" if p < 0.999 else "pass"
    assert strict.check("normality").verdict == expected
    assert strict.to_dict()["spec"]["thresholds"] == {"review": 0.999, "fail": 0.998}


def test_coefficients_and_prediction_match_statsmodels():
    # statsmodels cross-check: OLS params/bse/p and get_prediction CI and PI on the coded matrix
    frame = _ccd_frame(seed=2)
    x = frame[["A", "B", "C"]].to_numpy()
    frame["A"] = 20 + 10 * frame["A"]  # actual units, declared 10..30
    result = analyse(frame, FitSpec(response="Y", factors=(Factor("A", 10, 30), Factor("B"),
                                                           Factor("C")), model="quadratic"))
    cols = [np.ones(len(x)), x[:, 0], x[:, 1], x[:, 2], x[:, 0] * x[:, 1], x[:, 0] * x[:, 2],
            x[:, 1] * x[:, 2], x[:, 0] ** 2, x[:, 1] ** 2, x[:, 2] ** 2]
    xm = np.column_stack(cols)
    ols = sm.OLS(frame["Y"].to_numpy(), xm).fit()
    assert_allclose([c.estimate for c in result.coefficients], ols.params, rtol=1e-10)
    assert_allclose([c.std_error for c in result.coefficients], ols.bse, rtol=1e-10)
    assert_allclose([c.p_value for c in result.coefficients], ols.pvalues, rtol=1e-8)
    got = predict(result.to_dict(), {"A": 25.0, "B": -0.3, "C": 0.2})
    xa, xb, xc = 0.5, -0.3, 0.2
    row = np.array([[1, xa, xb, xc, xa * xb, xa * xc, xb * xc, xa**2, xb**2, xc**2]])
    pr = ols.get_prediction(row).summary_frame(alpha=0.05)
    assert_allclose(got["predicted"], pr["mean"].iloc[0], rtol=1e-10)
    assert_allclose(got["ci"], [pr["mean_ci_lower"].iloc[0], pr["mean_ci_upper"].iloc[0]],
                    rtol=1e-10)
    assert_allclose(got["pi"], [pr["obs_ci_lower"].iloc[0], pr["obs_ci_upper"].iloc[0]], rtol=1e-10)
    assert_allclose(result.fit["r_squared"], ols.rsquared, rtol=1e-12)
    assert_allclose(result.fit["adj_r_squared"], ols.rsquared_adj, rtol=1e-12)


def test_log_transform_back_transforms_prediction():
    frame = _ccd_frame(seed=3)
    frame["Y"] = np.exp(frame["Y"] / 20)
    result = analyse(frame, FitSpec(response="Y", factors=ABC, model="quadratic", transform="log"))
    got = predict(result, {"A": 0, "B": 0, "C": 0})
    assert_allclose(got["predicted"], np.exp(got["predicted_model_scale"]), rtol=1e-12)
    assert got["pi"][0] < got["ci"][0] < got["predicted"] < got["ci"][1] < got["pi"][1]
    inv = analyse(frame, FitSpec(response="Y", factors=ABC, model="quadratic", transform="inverse"))
    g = predict(inv, {"A": 0, "B": 0, "C": 0})
    assert g["ci"][0] < g["predicted"] < g["ci"][1]


def test_transform_domain_error_names_the_row():
    frame = _ccd_frame()
    frame.loc[5, "Y"] = -1.0
    with pytest.raises(AnalysisError, match="row 5"):
        analyse(frame, FitSpec(response="Y", factors=ABC, transform="log"))


def test_boxcox_transform_uses_estimated_lambda_and_reports_profile():
    frame = _ccd_frame(seed=5)
    result = analyse(frame, FitSpec(response="Y", factors=ABC, model="quadratic",
                                    transform="boxcox"))
    assert result.transform["lambda"] == round(result.boxcox["lambda_hat"], 2)
    assert len(result.boxcox["profile"]) == 31


def test_exclusion_of_unknown_row_and_missing_reason():
    frame = _ccd_frame()
    with pytest.raises(AnalysisError, match="row 99"):
        analyse(frame, FitSpec(response="Y", factors=ABC, exclusions=((99, "typo"),)))
    with pytest.raises(AnalysisError, match="written reason"):
        FitSpec(response="Y", factors=ABC, exclusions=((2, " "),))


def test_backward_reduction_keeps_hierarchy():
    x = np.vstack([full_factorial(3)] * 2)
    rng = np.random.default_rng(8)
    y = 10 + 4 * x[:, 0] + 3 * x[:, 0] * x[:, 1] + 0.3 * rng.normal(size=16)
    result = analyse(frame_from(x, y), FitSpec(response="Y", factors=ABC, model="full",
                                               reduce_alpha=0.05))
    assert set(result.terms) == {"A", "B", "A:B"}  # B kept as parent of A:B
    assert [s["term"] for s in result.reduction][0] == "A:B:C"


def test_blocks_enter_as_fixed_term_and_predictions_average_over_blocks():
    x = np.vstack([full_factorial(3), np.zeros((2, 3))] * 2)
    rng = np.random.default_rng(9)
    block = np.repeat(["day 1", "day 2"], 10)
    y = 5 + 2 * x[:, 0] + np.where(block == "day 2", 3.0, 0.0) + 0.2 * rng.normal(size=20)
    frame = frame_from(x, y, Day=block)
    result = analyse(frame, FitSpec(response="Y", factors=ABC, block="Day"))
    assert result.anova[0]["source"] == "Block" and result.anova[0]["df"] == 1
    assert "Block[day 1]" in [c.term for c in result.coefficients]
    got = predict(result, {"A": 0, "B": 0, "C": 0})
    assert_allclose(got["predicted"], y.mean(), rtol=1e-12)  # balanced: block average


def test_to_frame_views():
    result = analyse(_ccd_frame(), FitSpec(response="Y", factors=ABC, model="quadratic"))
    assert list(result.to_frame("coefficients").index)[:2] == ["Intercept", "A"]
    assert result.to_frame("runs").shape[0] == 20
    assert "verdict" in result.to_frame("checks").columns
    with pytest.raises(ValueError, match="Unknown table"):
        result.to_frame("nothing")


def test_missing_column_is_named():
    with pytest.raises(AnalysisError, match=r"Column 'Z' \(factor\)"):
        analyse(_ccd_frame(), FitSpec(response="Y", factors=(Factor("Z"),)))


def test_exact_fit_guards_division_by_zero():
    x = full_factorial(2)
    frame = frame_from(x, 1 + x[:, 0] + x[:, 1], extra=np.arange(4.0))
    frame = frame.drop(columns="extra")
    frame = pd.concat([frame, frame])
    frame.index = pd.RangeIndex(1, 9)
    result = analyse(frame, FitSpec(response="Y", factors=(Factor("A"), Factor("B"))))
    assert result.fit["s"] < 1e-12
    assert all(c.verdict == "not_applicable" for c in result.checks)
    json.dumps(result.to_dict())


def test_curvature_row_matches_the_centre_point_formula():
    # textbook formula: SS_curv = nF nC (ybarF - ybarC)² / (nF + nC)
    x = np.vstack([full_factorial(3), np.zeros((4, 3))])
    rng = np.random.default_rng(12)
    y = 10 + x[:, 0] + rng.normal(size=12) * 0.5
    y[8:] += 1.5
    result = analyse(frame_from(x, y), FitSpec(response="Y", factors=ABC))
    row = next(r for r in result.anova if r["source"] == "Curvature (centre points)")
    ss = 8 * 4 * (y[:8].mean() - y[8:].mean()) ** 2 / 12
    assert_allclose(row["sum_sq"], ss, rtol=1e-10)
    assert result.check("curvature").verdict in ("review", "fail")
    assert any("axial" in s for s in result.suggestions)


def test_a_run_without_a_response_value_must_be_left_out_with_a_reason():
    frame = _ccd_frame(seed=4)
    frame.loc[[4, 9], "Y"] = np.nan
    spec = {"response": "Y", "factors": ABC, "model": "quadratic"}
    with pytest.raises(AnalysisError, match=r"no value in rows 4, 9: leave those runs out"):
        analyse(frame, FitSpec(**spec))
    left_out = ((4, "sample lost in transit"), (9, "gauge fault"))
    for transform in ("none", "log"):
        shifted = frame.assign(Y=frame["Y"] + 100)
        result = analyse(shifted, FitSpec(**spec, transform=transform, exclusions=left_out))
        doc = json.loads(json.dumps(result.to_dict(), allow_nan=False))
        assert result.fit["n"] == len(frame) - 2
        runs = {r["row"]: r for r in doc["runs"]}
        assert runs[4]["excluded"] and runs[4]["observed"] is None
        # Same numbers as a fit of the table without those two rows.
        dropped = analyse(shifted.drop(index=[4, 9]), FitSpec(**spec, transform=transform))
        assert_allclose([c.estimate for c in result.coefficients],
                        [c.estimate for c in dropped.coefficients], rtol=1e-10)
