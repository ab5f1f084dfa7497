"""Outlier and influence checks, from the closed-form residuals."""

from __future__ import annotations

import numpy as np
from scipy import special

from .common import CheckContext, CheckResult, no_residual_information, not_applicable, rows_of

OUT_QUESTION = "Unexplained extreme runs?"
OUT_METHOD = ("|internally studentized residual| > 2.5 flags runs (about 1 % two-sided under "
              "normality, common practice); Bonferroni test on the largest deleted residual")
INF_QUESTION = "Does one run steer the fit?"
INF_METHOD = ("Cook's distance against F(0.5; p, n-p) (review) and F(0.9; p, n-p) (fail), after "
              "Cook (1977); leverage > 2p/n (review), common practice")
STUDENTIZED_LIMIT = 2.5


def check_outliers(ctx: CheckContext) -> CheckResult:
    cid, chart = "outliers", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart, reason)
    n, p = ctx.ls.n, ctx.ls.p
    if n - p - 1 < 1:
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart,
                              "not applicable: deleted residuals need at least 2 residual degrees of freedom")
    r = ctx.resid.studentized
    t = ctx.resid.deleted_studentized
    finite = np.isfinite(t)
    if not finite.any():
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart,
                              "not applicable: every run is fitted exactly")
    abs_t = np.where(finite, np.abs(t), -1.0)
    worst = int(np.argmax(abs_t))
    m = int(finite.sum())
    p_bonf = float(min(1.0, m * 2.0 * special.stdtr(n - p - 1, -abs_t[worst])))
    flagged = np.isfinite(r) & (np.abs(np.nan_to_num(r)) > STUDENTIZED_LIMIT)
    verdict = ctx.thresholds.verdict(p_bonf)
    runs = rows_of(ctx, flagged)
    worst_row = int(ctx.rows[worst])
    if verdict != "pass":
        msg = (f"Row {worst_row} lies further from the model than chance explains "
               f"(deleted residual {t[worst]:.2f}): check how that run was made and recorded; "
               "exclude it only with a written reason.")
    elif runs:
        msg = (f"{len(runs)} run(s) exceed |2.5| studentized, which is within chance for "
               f"{m} runs; look at them, but nothing is unexplained.")
    else:
        msg = "No run lies unusually far from the model."
    details = {"max_abs_deleted_studentized": float(abs_t[worst]), "max_row": worst_row,
               "limit": STUDENTIZED_LIMIT, "bonferroni_tests": m}
    return CheckResult(cid, OUT_QUESTION, OUT_METHOD, float(abs_t[worst]), p_bonf, verdict,
                       runs, msg, chart, details)


def check_influence(ctx: CheckContext) -> CheckResult:
    cid, chart = "influence", "cooks_distance"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, INF_QUESTION, INF_METHOD, chart, reason)
    n, p = ctx.ls.n, ctx.ls.p
    h = ctx.resid.leverage
    d = ctx.resid.cooks_distance
    cut_review = float(special.fdtri(p, n - p, 0.5))
    cut_fail = float(special.fdtri(p, n - p, 0.9))
    lev_cut = 2.0 * p / n
    dd = np.nan_to_num(d, nan=0.0)
    exact = h >= 1 - 1e-8
    high_lev = (h > lev_cut) & ~exact
    big = dd > cut_review
    huge = dd > cut_fail
    flagged = big | high_lev | exact
    if huge.any():
        verdict = "fail"
    elif flagged.any():
        verdict = "review"
    else:
        verdict = "pass"
    worst = int(np.argmax(dd))
    runs = rows_of(ctx, flagged)
    if verdict == "fail":
        msg = (f"Row {int(ctx.rows[worst])} alone moves the coefficients a long way (Cook's "
               f"distance {dd[worst]:.2f}): confirm that run, or repeat it, before relying on the model.")
    elif verdict == "review":
        parts = []
        if big.any():
            parts.append(f"{int(big.sum())} run(s) with Cook's distance above {cut_review:.2f}")
        if high_lev.any():
            parts.append(f"{int(high_lev.sum())} run(s) with leverage above {lev_cut:.2f}")
        if exact.any():
            parts.append(f"{int(exact.sum())} run(s) fitted exactly (leverage 1), whose residual "
                         "cannot be checked")
        msg = "; ".join(parts) + ": the fit leans on these runs, so confirm they were made as recorded."
    else:
        msg = "No single run steers the fit."
    details = {"cooks_review_limit": cut_review, "cooks_fail_limit": cut_fail,
               "leverage_limit": lev_cut, "max_cooks_distance": float(dd[worst]),
               "max_leverage": float(h.max())}
    return CheckResult(cid, INF_QUESTION, INF_METHOD, float(dd[worst]), None, verdict, runs,
                       msg, chart, details)
