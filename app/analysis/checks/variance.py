"""Constant-variance checks: Breusch–Pagan on fitted values; Brown–Forsythe and Bartlett by level.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..statistic import StatisticResult
from .common import (
    CheckContext,
    CheckResult,
    judged,
    level_groups,
    no_residual_information,
    not_applicable,
    row_medians,
    simulated_p,
)

FITTED_QUESTION = "Megaphone vs fitted values?"
FITTED_METHOD = ("Breusch-Pagan (Koenker's studentized form) of squared residuals on centred "
                 "fitted values; p from this design's own null distribution")
FACTOR_QUESTION = "Same spread at every level of this factor?"
FACTOR_METHOD = ("Brown-Forsythe (median-centred Levene) on studentized residuals across levels "
                 "with at least 3 runs; p from this design's own null distribution; Bartlett "
                 "beside it")
# Brown-Forsythe needs a median and a spread about it in each level: 2 runs give |x - median|
# equal in pairs, with no information about spread.
MIN_RUNS_PER_LEVEL = 3


def breusch_pagan(e: np.ndarray, z: np.ndarray) -> StatisticResult:
    """LM = n R² of e² regressed on [1, z] (Koenker 1981); chi-square with columns-of-z df.

    Each column of z is centred and scaled before the regression: R² does not change, but the
    rank (the df) is then judged on the variation, not on an offset (fitted values near 1e9
    would otherwise look constant next to the intercept). A column whose spread is rounding
    next to its size carries no information and is left out; with none left there is no test
    (LM 0, p NaN). Matches statsmodels het_breuschpagan(resid, exog) with its default
    robust=True; verified for y, 1e9 + y and 1e-9 y in tests/analysis/test_breusch_pagan_offsets.py.
    """
    z = np.atleast_2d(np.asarray(z, dtype=float).T).T
    n = len(e)
    u = e**2
    centred = z - z.mean(axis=0)
    spread = np.sqrt(np.mean(centred**2, axis=0))
    varies = spread > 1e-12 * np.abs(z).max(axis=0)
    x = np.column_stack([np.ones(n), centred[:, varies] / spread[varies]])
    coef, *_ = np.linalg.lstsq(x, u, rcond=None)
    fitted = x @ coef
    sst = float(np.sum((u - u.mean()) ** 2))
    r2 = float(np.sum((fitted - u.mean()) ** 2)) / sst if sst > 0 else 0.0
    df = int(np.linalg.matrix_rank(x) - 1)
    method = "Breusch-Pagan (Koenker), chi-square"
    if df == 0:  # nothing varies: no test (a missing p fails closed)
        return StatisticResult(0.0, None, (0,), method)
    lm = n * r2
    return StatisticResult(lm, float(special.chdtrc(df, lm)), (df,), method)


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
        return (float("inf") if between > 0 else float("nan"),
                0.0 if between > 0 else float("nan"), df1, df2)
    f = (between / df1) / (within / df2)
    return f, float(special.fdtrc(df1, df2, f)), df1, df2


def brown_forsythe(values: np.ndarray, labels: np.ndarray) -> StatisticResult:
    """W = one-way ANOVA F of |x - group median| (Brown & Forsythe 1974).

    Verified against NIST GEAR (W = 1.70592) and scipy.stats.levene(center='median').
    """
    labels = np.unique(labels, return_inverse=True)[1].ravel()
    medians = np.array([np.median(values[labels == g]) for g in range(labels.max() + 1)])
    w, p, df1, df2 = _one_way_f(np.abs(values - medians[labels]), labels)
    return StatisticResult(w, None if not np.isfinite(p) else p, (df1, df2),
                           "Brown-Forsythe (median-centred Levene), F")


def bartlett(values: np.ndarray, labels: np.ndarray) -> StatisticResult:
    """Bartlett's T, chi-square with k - 1 df. Verified against GEAR and scipy.stats.bartlett."""
    labels = np.unique(labels, return_inverse=True)[1].ravel()
    k = labels.max() + 1
    counts = np.bincount(labels).astype(float)
    means = np.bincount(labels, weights=values) / counts
    ss = np.bincount(labels, weights=(values - means[labels]) ** 2)
    var = ss / (counts - 1)
    n = counts.sum()
    pooled = ss.sum() / (n - k)
    method = "Bartlett, chi-square"
    if pooled <= 0 or np.any(var <= 0):
        return StatisticResult(float("nan"), None, (int(k - 1),), method)
    num = (n - k) * np.log(pooled) - np.sum((counts - 1) * np.log(var))
    den = 1 + (np.sum(1 / (counts - 1)) - 1 / (n - k)) / (3 * (k - 1))
    t = float(num / den)
    return StatisticResult(t, float(special.chdtrc(k - 1, t)), (int(k - 1),), method)


def breusch_pagan_rows(e: np.ndarray, fitted: np.ndarray) -> np.ndarray:
    """Koenker's LM = n R² of e² on [1, centred fitted] for each row of ``e``, vectorised."""
    f = fitted - fitted.mean()
    f = f / np.sqrt(f @ f)
    u = e**2
    u = u - u.mean(axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = (u @ f) ** 2 / np.sum(u**2, axis=1)
    return e.shape[1] * np.nan_to_num(r2)


def check_fitted(ctx: CheckContext) -> CheckResult:
    cid, chart = "constant_variance_fitted", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FITTED_QUESTION, FITTED_METHOD, chart, reason)
    fitted = ctx.ls.fitted
    if np.ptp(fitted) <= 1e-12 * max(1.0, float(np.abs(fitted).max())):
        return not_applicable(cid, FITTED_QUESTION, FITTED_METHOD, chart,
                              "not applicable: every fitted value is the same")
    usable = ctx.usable
    bp = breusch_pagan(ctx.ls.residuals[usable], fitted[usable])

    def statistic(e: np.ndarray) -> np.ndarray:
        return breusch_pagan_rows(e[:, usable], fitted[usable])

    p, null_p, details = simulated_p(ctx, statistic, textbook_p=bp.pvalue, defect="megaphone",
                                     fitted=fitted)
    details["df"] = list(bp.df)
    return judged(cid, FITTED_QUESTION, FITTED_METHOD, chart, ctx, bp.statistic, p,
                  "Residual spread does not change with the fitted value.",
                  "Residual spread grows or shrinks with the fitted value (a megaphone): try a "
                  "log or square-root transformation of the response; see the Box-Cox "
                  "suggestion.", null_p=null_p, details=details)


def brown_forsythe_rows(r: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Brown–Forsythe W for each row of ``r`` with groups ``labels`` (0..k-1), vectorised."""
    order = np.argsort(labels, kind="stable")
    r = r[:, order]
    counts = np.bincount(labels)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    d = np.empty_like(r)
    for start, count in zip(starts, counts, strict=True):
        block = r[:, start:start + count]
        d[:, start:start + count] = np.abs(block - row_medians(block))
    means = np.add.reduceat(d, starts, axis=1) / counts
    grand = d.mean(axis=1, keepdims=True)
    between = np.sum(counts * (means - grand) ** 2, axis=1)
    within = np.sum((d - np.repeat(means, counts, axis=1)) ** 2, axis=1)
    k, n = len(counts), r.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(within > 0, (between / (k - 1)) / (within / (n - k)), np.inf)


def spread_groups(x: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """Levels of a factor for comparing spreads.

    The distinct levels when each has at least MIN_RUNS_PER_LEVEL usable runs; otherwise (the
    two axial runs of a central composite design, say) the runs below, at and above the centre,
    so that the extreme settings, where a change of spread shows most, still count.
    """
    labels = level_groups(x)
    counts = np.bincount(labels[usable], minlength=labels.max() + 1)
    present = np.unique(labels)
    if np.all(counts[present] >= MIN_RUNS_PER_LEVEL) or len(present) < 3:
        return labels
    side = np.sign(np.round(x, 9)).astype(int) + 1
    return np.unique(side, return_inverse=True)[1].ravel()


def check_factor(ctx: CheckContext, j: int) -> CheckResult:
    name = ctx.factor_names[j]
    cid, chart = f"constant_variance_factor:{name}", f"spread_by_level:{name}"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart, reason)
    usable_runs = ctx.usable
    level_names = ctx.levels.get(j)
    # a categorical factor's groups are its levels, never bins or sides of a centre
    labels = (ctx.coded[:, j].astype(np.int64) - 1 if level_names is not None
              else spread_groups(ctx.coded[:, j], usable_runs))
    counts = np.bincount(labels[usable_runs], minlength=labels.max() + 1)
    usable = usable_runs & (counts[labels] >= MIN_RUNS_PER_LEVEL)
    kept_levels = int(np.sum(counts >= MIN_RUNS_PER_LEVEL))
    if kept_levels < 2:
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart,
                              f"not applicable: fewer than two levels of '{name}' have "
                              f"{MIN_RUNS_PER_LEVEL} or more runs, so spreads cannot be compared")
    lab = np.unique(labels[usable], return_inverse=True)[1].ravel()
    scale = 1.0 / np.sqrt(1.0 - ctx.resid.leverage[usable])
    r = ctx.resid.studentized[usable]
    bf = brown_forsythe(r, lab)
    if not np.isfinite(bf.statistic):
        return not_applicable(cid, FACTOR_QUESTION, FACTOR_METHOD, chart,
                              f"not applicable: residuals show no spread within the levels of "
                              f"'{name}'")

    def statistic(e: np.ndarray) -> np.ndarray:
        return brown_forsythe_rows(e[:, usable] * scale, lab)

    high = ctx.coded[:, j] > np.median(ctx.coded[:, j]) + 1e-9
    p, null_p, details = simulated_p(ctx, statistic, textbook_p=bf.pvalue, defect="spread",
                                     high=high)
    bt = bartlett(r, lab)
    sds = {}
    settings = ctx.coded[usable, j]
    for g in np.unique(lab):
        vals = settings[lab == g]
        key = (level_names[int(vals[0]) - 1] if level_names is not None
               else f"{float(np.median(vals)):.6g}")
        sds[key] = float(np.std(r[lab == g], ddof=1))
    details.update({"df": list(bf.df), "bartlett": bt.statistic, "bartlett_p": bt.pvalue,
                    "bartlett_df": bt.df[0],
                    "levels_used": kept_levels, "sd_by_level_studentized": sds,
                    "runs_left_out": int((~usable).sum())})
    return judged(cid, FACTOR_QUESTION, FACTOR_METHOD, chart, ctx, bf.statistic, p,
                  f"Residual spread is similar at every level of '{name}'.",
                  f"Residual spread differs between levels of '{name}': a transformation of the "
                  "response may help, or the process is less repeatable at some settings.",
                  null_p=null_p, details=details)
