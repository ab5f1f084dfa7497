"""Outlier and influence checks, from the closed-form residuals."""

from __future__ import annotations

import numpy as np
from scipy import special

from .common import (
    CheckContext,
    CheckResult,
    judged,
    no_residual_information,
    not_applicable,
    rows_of,
    simulated,
)

OUT_QUESTION = "Unexplained extreme runs?"
OUT_METHOD = ("largest |internally studentized residual|, p from this design's own null "
              "distribution (Bonferroni bound on the deleted residual beside it); runs beyond "
              "±2.5 are marked (about 1 % each two-sided under normality, common practice)")
INF_QUESTION = "Does one run steer the fit?"
INF_METHOD = ("largest Cook's distance, p from this design's own null distribution; runs above "
              "F(0.5; p, n-p) (after Cook 1977) are marked; leverage above 2p/n is shown as a "
              "property of the design (common practice)")
STUDENTIZED_LIMIT = 2.5


def _studentized_rows(e: np.ndarray, one_minus_h: np.ndarray, df_resid: int) -> np.ndarray:
    """Internally studentized residuals e / (s √(1 − h)) for each row of ``e``."""
    s = np.sqrt(np.sum(e**2, axis=1, keepdims=True) / df_resid)
    with np.errstate(divide="ignore", invalid="ignore"):
        return e / (s * np.sqrt(one_minus_h))


def check_outliers(ctx: CheckContext) -> CheckResult:
    cid, chart = "outliers", "residuals_vs_fitted"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart, reason)
    n, p = ctx.ls.n, ctx.ls.p
    if n - p - 1 < 1:
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart,
                              "not applicable: deleted residuals need at least 2 residual "
                              "degrees of freedom")
    usable = ctx.usable
    if not usable.any():
        return not_applicable(cid, OUT_QUESTION, OUT_METHOD, chart,
                              "not applicable: every run is fitted exactly")
    one_minus_h = 1.0 - ctx.resid.leverage[usable]
    r = np.where(usable, ctx.resid.studentized, 0.0)
    worst = int(np.argmax(np.abs(r)))
    t_worst = float(ctx.resid.deleted_studentized[worst])
    m = int(usable.sum())
    p_bonf = float(min(1.0, m * 2.0 * special.stdtr(n - p - 1, -abs(t_worst))))

    def statistic(e: np.ndarray) -> np.ndarray:
        return np.max(np.abs(_studentized_rows(e[:, usable], one_minus_h, ctx.ls.df_resid)),
                      axis=1)

    stat, p_value, null_p, details = simulated(ctx, statistic, textbook_p=p_bonf,
                                               defect="outlier")
    runs = rows_of(ctx, np.abs(r) > STUDENTIZED_LIMIT)
    worst_row = int(ctx.rows[worst])
    if runs:
        good = (f"{len(runs)} run(s) beyond ±{STUDENTIZED_LIMIT} studentized, which is within "
                f"chance for {m} runs in this design; look at them, but nothing is unexplained.")
    else:
        good = "No run lies unusually far from the model."
    bad = (f"Row {worst_row} lies further from the model than chance explains (studentized "
           f"residual {r[worst]:.2f}): check how that run was made and recorded; exclude it "
           "only with a written reason.")
    details.update({"max_abs_studentized": float(abs(r[worst])), "max_row": worst_row,
                    "max_abs_deleted_studentized": abs(t_worst), "limit": STUDENTIZED_LIMIT,
                    "bonferroni_tests": m})
    return judged(cid, OUT_QUESTION, OUT_METHOD, chart, ctx, stat, p_value, good, bad,
                  null_p=null_p, runs=runs, details=details)


def check_influence(ctx: CheckContext) -> CheckResult:
    cid, chart = "influence", "cooks_distance"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, INF_QUESTION, INF_METHOD, chart, reason)
    n, p = ctx.ls.n, ctx.ls.p
    usable = ctx.usable
    if not usable.any():
        return not_applicable(cid, INF_QUESTION, INF_METHOD, chart,
                              "not applicable: every run is fitted exactly")
    h = ctx.resid.leverage
    d = np.where(usable, np.nan_to_num(ctx.resid.cooks_distance, nan=0.0), 0.0)
    cut_review = float(special.fdtri(p, n - p, 0.5))
    lev_cut = 2.0 * p / n
    weight = h[usable] / (p * (1.0 - h[usable]))

    def statistic(e: np.ndarray) -> np.ndarray:
        r = _studentized_rows(e[:, usable], 1.0 - h[usable], ctx.ls.df_resid)
        return np.max(r**2 * weight, axis=1)

    stat, p_value, null_p, details = simulated(ctx, statistic)
    worst = int(np.argmax(d))
    exact = ~usable
    high_lev = (h > lev_cut) & usable
    runs = rows_of(ctx, (d > cut_review) | exact)
    notes = []
    if high_lev.any():
        notes.append(f"{int(high_lev.sum())} run(s) have leverage above {lev_cut:.2f}, a property "
                     "of the design's settings, not of the data")
    if exact.any():
        notes.append(f"{int(exact.sum())} run(s) are fitted exactly (leverage 1), so their "
                     "residuals cannot be checked")
    note = (" " + "; ".join(notes) + ".") if notes else ""
    good = "No single run steers the fit more than chance allows in this design." + note
    bad = (f"Row {int(ctx.rows[worst])} alone moves the coefficients a long way (Cook's "
           f"distance {d[worst]:.2f}): confirm that run, or repeat it, before relying on the "
           "model." + note)
    details.update({"cooks_review_limit": cut_review, "leverage_limit": lev_cut,
                    "max_cooks_distance": float(d[worst]), "max_leverage": float(h.max()),
                    "high_leverage_rows": list(rows_of(ctx, high_lev))})
    if p_value is None:  # no draws (large n): Cook's rule of thumb alone, as information
        details["p_method"] = "no p-value above the simulated run count; marks only"
        return CheckResult(cid, INF_QUESTION, INF_METHOD, float(d[worst]), None,
                           "review" if runs else "pass", runs, bad if runs else good, chart,
                           details)
    return judged(cid, INF_QUESTION, INF_METHOD, chart, ctx, stat, p_value, good, bad,
                  null_p=null_p, runs=runs, details=details)
