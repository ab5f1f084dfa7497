"""Constant-variance checks: Breusch–Pagan on fitted values; Brown–Forsythe and Bartlett by level."""

from __future__ import annotations

import numpy as np
from scipy import special

from .common import CheckContext, CheckResult, level_groups, no_residual_information, not_applicable

FITTED_QUESTION = "Megaphone vs fitted values?"
FITTED_METHOD = "Breusch-Pagan (Koenker's studentized form) of squared residuals on fitted values"
FACTOR_QUESTION = "Same spread at every level of this factor?"
FACTOR_METHOD = "Brown-Forsythe (median-centred Levene) across levels; Bartlett beside it"


def breusch_pagan(e: np.ndarray, z: np.ndarray) -> tuple[float, float, int]:
    """LM = n R² of e² regressed on [1, z] (Koenker 1981); chi-square with columns-of-z df.

    Matches statsmodels het_breuschpagan(resid, exog) with its default robust=True.
    """
    z = np.atleast_2d(np.asarray(z, dtype=float).T).T
    n = len(e)
    u = e**2
    x = np.column_stack([np.ones(n), z])
    coef, *_ = np.linalg.lstsq(x, u, rcond=None)
    fitted = x @ coef
    sst = float(np.sum((u - u.mean()) ** 2))
    r2 = float(np.sum((fitted - u.mean()) ** 2)) / sst if sst > 0 else 0.0
    df = int(np.linalg.matrix_rank(x) - 1)
    lm = n * r2
    return lm, float(special.chdtrc(df, lm)), df


def _one_way_f(values: np.ndarray, labels: np.ndarray) -> tuple[float, float, int, int]:
    counts = np.bincount(labels)
    keep = counts > 0
    k = int(keep.sum())
    n = len(values)
    means = np.bincount(labels, weights=values) / np.where(counts > 0, counts, 1)
    grand = values.mean()
    between = float(np.sum(counts[keep] * (means[keep] - grand) ** 2))
    within = float(np.sum((values - means[labels]) ** 2))
    df1, df2 = k - 1, n - k
    if within <= 0:
        return float("inf") if between > 0 else float("nan"), 0.0 if between > 0 else float("nan"), df1, df2
    f = (between / df1) / (within / df2)
    return f, float(special.fdtrc(df1, df2, f)), df1, df2


def brown_forsythe(values: np.ndarray, labels: np.ndarray) -> tuple[float, float, int, int]:
    """W = one-way ANOVA F of |x - group median| (Brown & Forsythe 1974).

    Verified against NIST GEAR (W = 1.70592) and scipy.stats.levene(center='median').
    """
    labels = np.unique(labels, return_inverse=True)[1].ravel()
    medians = np.array([np.median(values[labels == g]) for g in range(labels.max() + 1)])
    return _one_way_f(np.abs(values - medians[labels]), labels)


def bartlett(values: np.ndarray, labels: np.ndarray) -> tuple[float, float, int]:
    """Bartlett's T, chi-square with k - 1 df. Verified against GEAR and scipy.stats.bartlett."""
    labels = np.unique(labels, return_inverse=True)[1].ravel()
    k = labels.max() + 1
    counts = np.bincount(labels).astype(float)
    means = np.bincount(labels, weights=values) / counts
    ss = np.bincount(labels, weights=(values - means[labels]) ** 2)
    var = ss / (counts - 1)
    n = counts.sum()
    pooled = ss.sum() / (n - k)
    if pooled <= 0 or np.any(var <= 0):
        return float("nan"), float("nan"), int(k - 1)
    num = (n - k) * np.log(pooled) - np.sum((counts - 1) * np.log(var))
    den = 1 + (np.sum(1 / (counts - 1)) - 1 / (n - k)) / (3 * (k - 1))
    t = float(num / den)
    return t, float(special.chdtrc(k - 1, t)), int(k - 1)


def check_fitted(ctx: CheckContext) -> CheckResult:
    cid, chart = "constant_variance_fitted", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FITTED_QUESTION, FITTED_METHOD, chart, reason)
    fitted = ctx.ls.fitted
    if np.ptp(fitted) <= 1e-12 * max(1.0, float(np.abs(fitted).max())):
        return not_applicable(cid, FITTED_QUESTION, FITTED_METHOD, chart,
                              "not applicable: every fitted value is the same")
    lm, p, df = breusch_pagan(ctx.ls.residuals, fitted)
    verdict = ctx.thresholds.verdict(p)
    msg = ("Residual spread does not change with the fitted value." if verdict == "pass" else
           "Residual spread grows or shrinks with the fitted value (a megaphone): try a log or "
           "square-root transformation of the response; see the Box-Cox suggestion.")
    return CheckResult(cid, FITTED_QUESTION, FITTED_METHOD, lm, p, verdict, (), msg, chart,
                       {"df": df})


def check_factor(ctx: CheckContext, j: int) -> CheckResult:
    name = ctx.factor_names[j]
    cid, chart = f"constant_variance_factor:{name}", f"spread_by_level:{name}"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart, reason)
    labels = level_groups(ctx.coded[:, j])
    counts = np.bincount(labels)
    usable = counts[labels] >= 2
    kept_levels = int(np.sum(counts >= 2))
    if kept_levels < 2:
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart,
                              f"not applicable: fewer than two levels of '{name}' have two or more runs")
    e = ctx.ls.residuals[usable]
    lab = labels[usable]
    w, p, df1, df2 = brown_forsythe(e, lab)
    if not np.isfinite(p):
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart,
                              f"not applicable: residuals show no spread within the levels of '{name}'")
    t, t_p, t_df = bartlett(e, lab)
    verdict = ctx.thresholds.verdict(p)
    msg = (f"Residual spread is similar at every level of '{name}'." if verdict == "pass" else
           f"Residual spread differs between levels of '{name}': a transformation of the "
           "response may help, or the process is less repeatable at some settings.")
    sds = {}
    for g in np.unique(lab):
        vals = ctx.coded[usable, j][lab == g]
        sds[f"{float(np.median(vals)):.6g}"] = float(np.std(e[lab == g], ddof=1))
    details = {"df": [df1, df2], "bartlett": t, "bartlett_p": t_p, "bartlett_df": t_df,
               "levels_used": kept_levels, "sd_by_level_coded": sds,
               "runs_left_out": int((~usable).sum())}
    return CheckResult(cid, FACTOR_QUESTION, FACTOR_METHOD, w, p, verdict, (), msg, chart, details)
