"""Normality of residuals: Anderson–Darling with the D'Agostino–Stephens p-value."""

from __future__ import annotations

import numpy as np
from scipy import special

from ..statistic import StatisticResult
from .common import (
    CheckContext,
    CheckResult,
    judged,
    no_residual_information,
    not_applicable,
    simulated,
)

QUESTION = "Do residuals look normal?"
METHOD = ("Anderson-Darling A² on internally studentized residuals; p from this design's own "
          "null distribution (D'Agostino & Stephens p beside it)")
MIN_RUNS = 8  # the p-value pieces of D'Agostino & Stephens (1986) are tabled from n = 8


def anderson_darling(x: np.ndarray) -> StatisticResult:
    """A² for normality with estimated mean and SD; A* in the extras; p from A*.

    A² = -n - (1/n) sum (2i - 1)[ln Phi(w_i) + ln(1 - Phi(w_{n+1-i}))], w standardized with the
    n - 1 SD; A* = A² (1 + 0.75/n + 2.25/n²); p from D'Agostino & Stephens (1986), Table 4.9.
    Verified against the R nortest/fBasics values in diagnostics_reference_values.json and
    scipy.stats.anderson's statistic.
    """
    x = np.sort(np.asarray(x, dtype=float))
    n = len(x)
    sd = x.std(ddof=1)
    w = (x - x.mean()) / sd
    log_cdf = special.log_ndtr(w)
    log_sf = special.log_ndtr(-w[::-1])
    i = np.arange(1, n + 1)
    a2 = float(-n - np.sum((2 * i - 1) * (log_cdf + log_sf)) / n)
    a_star = a2 * (1.0 + 0.75 / n + 2.25 / n**2)
    if a_star < 0.2:
        p = 1.0 - np.exp(-13.436 + 101.14 * a_star - 223.73 * a_star**2)
    elif a_star < 0.34:
        p = 1.0 - np.exp(-8.318 + 42.796 * a_star - 59.938 * a_star**2)
    elif a_star < 0.6:
        p = np.exp(0.9177 - 4.279 * a_star - 1.38 * a_star**2)
    else:
        p = np.exp(1.2937 - 5.709 * a_star + 0.0186 * a_star**2)
    return StatisticResult(a2, float(min(max(p, 0.0), 1.0)), (),
                           "Anderson-Darling, D'Agostino & Stephens p", {"a_star": float(a_star)})


def anderson_darling_rows(x: np.ndarray) -> np.ndarray:
    """A² of each row of ``x`` (mean and SD estimated), vectorised; as :func:`anderson_darling`."""
    x = np.sort(np.asarray(x, dtype=float), axis=1)
    n = x.shape[1]
    w = (x - x.mean(axis=1, keepdims=True)) / x.std(axis=1, ddof=1, keepdims=True)
    i = np.arange(1, n + 1)
    # log(ndtr) rather than log_ndtr: twice as fast, and |w| < √n keeps ndtr far from 0
    log_cdf = np.log(special.ndtr(w)) + np.log(special.ndtr(-w[:, ::-1]))
    return -n - np.sum((2 * i - 1) * log_cdf, axis=1) / n


def check_normality(ctx: CheckContext) -> CheckResult:
    """Anderson–Darling on the studentized residuals of runs not fitted exactly.

    Raw residuals have unequal variances σ²(1 − h); dividing by √(1 − h) evens them out, and
    the remaining dependence is in the simulated null distribution.
    """
    chart = "normal_probability"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable("normality", QUESTION, METHOD, chart, reason)
    if ctx.ls.df_resid <= 2:
        return not_applicable("normality", QUESTION, METHOD, chart,
                              f"not applicable: with {ctx.ls.df_resid} residual degree(s) of "
                              "freedom the residuals' shape is fixed by the design, whatever the "
                              "errors' distribution")
    usable = ctx.usable
    if int(usable.sum()) < MIN_RUNS:
        return not_applicable("normality", QUESTION, METHOD, chart,
                              f"not applicable: {int(usable.sum())} usable residuals are fewer "
                              f"than the {MIN_RUNS} the Anderson-Darling test needs")
    scale = 1.0 / np.sqrt(1.0 - ctx.resid.leverage[usable])

    def statistic(e: np.ndarray) -> np.ndarray:
        return anderson_darling_rows(e[:, usable] * scale)

    r = ctx.resid.studentized[usable]
    ad = anderson_darling(r)
    stat, p, null_p, details = simulated(ctx, statistic, textbook_p=ad.pvalue)
    centred = r - r.mean()
    m2 = float(np.mean(centred**2))
    details.update(a_star=ad.extras["a_star"], n=int(usable.sum()),
                   skewness=float(np.mean(centred**3)) / m2**1.5 if m2 > 0 else None)
    return judged("normality", QUESTION, METHOD, chart, ctx, stat, p,
                  "Residuals are consistent with a normal distribution.",
                  "Residuals depart from a normal distribution: look at the normal probability "
                  "plot for outliers or skew, and consider a transformation of the response.",
                  null_p=null_p, details=details)
