"""Model-form checks: curvature vs fitted values and vs each factor, covariates left out of the
model, lack of fit against pure error, and the centre-point curvature test.

All but lack of fit are added-column F tests (see common.added_columns_test): OLS residuals are
orthogonal to every model column, so the informative questions are about columns the model lacks.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..anova import pure_error
from .common import (
    AddedColumnsTest,
    CheckContext,
    CheckResult,
    added_columns_test,
    judged,
    level_indicators,
    no_residual_information,
    not_applicable,
)

FITTED_Q = "Any curve or slope vs fitted values?"
FITTED_M = ("one-degree-of-freedom curvature test: F for adding (fitted)² to the model "
            "(after Tukey 1949)")
FACTOR_Q = "Any curve vs a factor?"
FACTOR_M = ("lack of fit across this factor's levels: F for adding one indicator per level "
            "(x² and x³ for a factor with more than 12 levels)")
COV_Q = ("Do residuals follow a recorded variable left out of the model (operator, raw-material "
         "lot, ambient humidity)?")
COV_NUM_M = "partial correlation of residuals with the covariate: F for adding it to the model"
COV_CAT_M = ("one-way test of residuals across the covariate's categories: "
             "F for adding its indicators")
LOF_Q = "Is the model form wrong?"
LOF_M = "lack-of-fit F test against pure error from replicated runs"
CURV_Q = "Do centre points sit off the plane?"
CURV_M = "centre-point mean vs factorial mean: F for adding a centre-point indicator"


def _f_result(cid: str, q: str, m: str, chart: str, ctx: CheckContext,
              test: AddedColumnsTest | None, good: str, bad: str, details: dict | None = None,
              na_reason: str = "") -> CheckResult:
    if test is None:
        return not_applicable(cid, q, m, chart, na_reason)
    info = {"df": [test.df1, test.df2], "p_method": "exact F distribution"}
    info.update(details or {})
    return judged(cid, q, m, chart, ctx, test.f, test.p_value, good, bad, null_p=test.null_p,
                  details=info)


def check_fitted(ctx: CheckContext) -> CheckResult:
    cid, chart = "pattern_fitted", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FITTED_Q, FITTED_M, chart, reason)
    f = ctx.ls.fitted
    spread = np.ptp(f)
    if spread <= 1e-12 * max(1.0, float(np.abs(f).max())):
        return not_applicable(cid, FITTED_Q, FITTED_M, chart,
                              "not applicable: every fitted value is the same")
    centred = (f - f.mean()) / spread
    return _f_result(cid, FITTED_Q, FITTED_M, chart, ctx, added_columns_test(ctx, centred**2),
                     "No curve in the residuals against the fitted values.",
                     "Residuals curve against the fitted values: the model may need square or "
                     "interaction terms, or the response a transformation (see Box-Cox).",
                     na_reason="not applicable: the squared fitted values add nothing "
                               "the model lacks")


def check_factor(ctx: CheckContext, j: int) -> CheckResult:
    name = ctx.factor_names[j]
    cid, chart = f"pattern_factor:{name}", f"residuals_vs_factor:{name}"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FACTOR_Q, FACTOR_M, chart, reason)
    x = ctx.coded[:, j]
    n_levels = len(np.unique(np.round(x, 9)))
    if _is_the_curvature_test(ctx, x):
        return not_applicable(cid, FACTOR_Q, FACTOR_M, chart,
                              f"not applicable: '{name}' is at two levels plus the centre points, "
                              "so a curve along it is the centre-point contrast that the "
                              "curvature check already tests; which factor's square causes it "
                              "cannot be separated without axial runs")
    categorical = j in ctx.levels
    # a categorical factor's level numbers have no spacing: only its level indicators apply
    z = level_indicators(x, max_levels=len(ctx.levels[j])) if categorical else level_indicators(x)
    if z is None:
        xs = x / max(float(np.abs(x).max()), 1e-300)
        z = np.column_stack([xs**2, xs**3])
    if n_levels < 3:
        na = (f"not applicable: '{name}' has only {n_levels} level(s), so a curve along it cannot "
              "be seen; other checks (curvature, lack of fit) still apply")
    else:
        na = f"not applicable: the model already fits every level of '{name}' separately"
    return _f_result(cid, FACTOR_Q, FACTOR_M, chart, ctx, added_columns_test(ctx, z),
                     f"No curve or step in the residuals across '{name}'.",
                     (f"Residuals differ between the levels of '{name}': the model misses a "
                      f"difference between its levels; add '{name}' or its interactions."
                      if categorical else
                      f"Residuals change systematically across '{name}': the model misses a "
                      f"curve along it; try adding {name}^2 (a square term needs three or more "
                      "levels)."),
                     {"levels": n_levels}, na_reason=na)


def _is_the_curvature_test(ctx: CheckContext, x: np.ndarray) -> bool:
    """True when the factor's level indicators add only the centre-point indicator.

    On a two-level design with centre points (and no other runs off the cube), every factor's
    middle level is exactly the set of centre runs: its lack-of-fit F is the curvature F.
    """
    d = ctx.design
    if d.kind not in ("two_level_full_factorial", "two_level_fractional_factorial"):
        return False
    if d.n_centre == 0:
        return False
    centre = ~(np.abs(ctx.coded) > 1e-4).any(axis=1)
    middle = np.abs(np.round(x, 9)) < 1e-4
    return bool(np.array_equal(middle, centre))


def confounded_covariates(ctx: CheckContext) -> dict[str, list[str]]:
    """Covariates whose columns, beyond the model, span the same space as another's."""
    spans = {}
    for name, (kind, values) in ctx.covariates.items():
        z = _covariate_columns(kind, values)
        if z is None:
            continue
        test = added_columns_test(ctx, z)
        if test is not None:
            spans[name] = test.basis @ test.basis.T
    out: dict[str, list[str]] = {}
    names = list(spans)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            if np.allclose(spans[a], spans[b], atol=1e-8):
                out.setdefault(a, []).append(b)
                out.setdefault(b, []).append(a)
    return out


def _covariate_columns(kind: str, values: np.ndarray) -> np.ndarray | None:
    """The columns a covariate adds: centred values, or one indicator per category."""
    if kind == "numeric":
        v = np.asarray(values, dtype=float)
        if not np.all(np.isfinite(v)) or np.ptp(v) == 0:
            return None
        return (v - v.mean()) / np.ptp(v)
    v = np.asarray(values, dtype=object)
    if any(x is None or x == "" for x in v):
        return None
    labels, codes = np.unique(v.astype(str), return_inverse=True)
    if len(labels) < 2:
        return None
    return (codes.ravel()[:, None] == np.arange(len(labels))[None, :]).astype(float)


def check_covariate(ctx: CheckContext, name: str) -> CheckResult:
    kind, values = ctx.covariates[name]
    cid, chart = f"covariate:{name}", f"residuals_vs_covariate:{name}"
    method = COV_NUM_M if kind == "numeric" else COV_CAT_M
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, COV_Q, method, chart, reason)
    if kind == "numeric":
        v = np.asarray(values, dtype=float)
        missing = ~np.isfinite(v)
    else:
        v = np.asarray(values, dtype=object)
        missing = np.array([x is None or (isinstance(x, float) and np.isnan(x)) or x == ""
                            for x in v])
    if missing.any():
        rows = ", ".join(str(int(r)) for r in ctx.rows[missing][:5])
        return not_applicable(cid, COV_Q, method, chart,
                              f"not applicable: '{name}' has no value in rows {rows}")
    e = ctx.ls.residuals
    details: dict = {"kind": kind}
    if kind == "numeric":
        if np.ptp(v) == 0:
            return not_applicable(cid, COV_Q, method, chart,
                                  f"not applicable: '{name}' is constant")
        z = (v - v.mean()) / np.ptp(v)
        details["correlation_with_residuals"] = (
            float(np.corrcoef(v, e)[0, 1]) if np.std(e) > 0 else None)
    else:
        labels, codes = np.unique(v.astype(str), return_inverse=True)
        codes = codes.ravel()
        if len(labels) < 2:
            return not_applicable(cid, COV_Q, method, chart,
                                  f"not applicable: '{name}' has a single category")
        z = (codes[:, None] == np.arange(len(labels))[None, :]).astype(float)
        details["mean_residual_by_category"] = {
            str(lab): float(e[codes == i].mean()) for i, lab in enumerate(labels)}
    partners = confounded_covariates(ctx).get(name)
    if partners:
        details["confounded_with"] = partners
    return _f_result(cid, COV_Q, method, chart, ctx, added_columns_test(ctx, z),
                     f"Residuals do not follow '{name}'." + _confounded_note(name, partners),
                     f"Residuals follow '{name}', which the model leaves out: it affects the "
                     "response; consider blocking on it or adding it as a factor in a new study."
                     + _confounded_note(name, partners),
                     details,
                     na_reason=f"not applicable: '{name}' is already explained "
                               "by the model's columns")


def _confounded_note(name: str, partners: list[str] | None) -> str:
    if not partners:
        return ""
    return (f" '{name}' is confounded with {', '.join(repr(p) for p in partners)} in these runs: "
            "the data cannot tell them apart, so this result is theirs jointly.")


def check_lack_of_fit(ctx: CheckContext) -> CheckResult:
    cid, chart = "lack_of_fit", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, LOF_Q, LOF_M, chart, reason)
    pe_ss, pe_df = pure_error(ctx.ls.fitted + ctx.ls.residuals, ctx.groups)
    if pe_df == 0:
        return not_applicable(cid, LOF_Q, LOF_M, chart,
                              "not applicable: no settings were replicated, "
                              "so there is no pure error")
    lof_df = ctx.ls.df_resid - pe_df
    if lof_df <= 0:
        return not_applicable(cid, LOF_Q, LOF_M, chart,
                              "not applicable: the model has a term for every distinct setting")
    lof_ss = max(ctx.ls.sse - pe_ss, 0.0)
    details = {"df": [lof_df, pe_df], "lack_of_fit_ss": lof_ss, "pure_error_ss": pe_ss,
               "p_method": "exact F distribution"}
    if pe_ss <= 0:
        return not_applicable(cid, LOF_Q, LOF_M, chart,
                              "not applicable: replicated runs agree exactly, so there is no "
                              "pure error to compare the misfit with", details)
    f = (lof_ss / lof_df) / (pe_ss / pe_df)
    p = float(special.fdtrc(lof_df, pe_df, f))
    null_p = None
    if ctx.null is not None:
        e = ctx.null.residuals  # e = y - fitted: replicate groups' scatter is the same in e
        labels = np.unique(ctx.groups, return_inverse=True)[1].ravel()
        indicator = (labels[:, None] == np.arange(labels.max() + 1)[None, :]).astype(float)
        counts = indicator.sum(axis=0)
        sums = e @ indicator
        pe = np.sum(e**2, axis=1) - np.sum(sums**2 / counts, axis=1)
        lof = np.sum(e**2, axis=1) - pe
        null_p = special.fdtrc(lof_df, pe_df, (lof / lof_df) / (pe / pe_df))
    return judged(cid, LOF_Q, LOF_M, chart, ctx, f, p,
                  "The model's misfit is no larger than the run-to-run scatter of replicated "
                  "points.",
                  "The model misses the replicated points by more than their own scatter: the "
                  "model form is wrong; try adding interaction or square terms, or a "
                  "transformation.", null_p=null_p, details=details)


def check_curvature(ctx: CheckContext) -> CheckResult:
    cid, chart = "curvature", "residuals_vs_fitted"
    d = ctx.design
    if d.kind not in ("two_level_full_factorial", "two_level_fractional_factorial"):
        return not_applicable(cid, CURV_Q, CURV_M, chart,
                              "not applicable: the centre-point test is for two-level designs with "
                              "centre points; this design is " + d.kind.replace("_", " "))
    if d.n_centre == 0:
        return not_applicable(cid, CURV_Q, CURV_M, chart,
                              "not applicable: the design has no centre points")
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, CURV_Q, CURV_M, chart, reason)
    centre = ~(np.abs(ctx.coded) > 1e-4).any(axis=1)
    y = ctx.ls.fitted + ctx.ls.residuals
    details = {"centre_mean": float(y[centre].mean()), "factorial_mean": float(y[~centre].mean()),
               "n_centre": int(centre.sum()), "n_factorial": int((~centre).sum())}
    test = added_columns_test(ctx, centre.astype(float))
    if test is not None and np.isfinite(test.f):
        details["sum_sq"] = float(np.sum((ctx.ls.residuals @ test.basis) ** 2))
    return _f_result(cid, CURV_Q, CURV_M, chart, ctx, test,
                     "Centre points agree with the plane through the factorial points.",
                     "Centre points sit off the plane through the factorial points: the response "
                     "curves inside the region. Which factor's square causes it cannot be told "
                     "from centre points alone: add axial runs so square terms can be estimated.",
                     details,
                     na_reason="not applicable: the model already contains a square term, which "
                               "absorbs the centre-point contrast")
