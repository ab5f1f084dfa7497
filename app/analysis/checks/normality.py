"""Normality of residuals: Anderson–Darling with the D'Agostino–Stephens p-value."""

from __future__ import annotations

import numpy as np
from scipy import special

from .common import CheckContext, CheckResult, no_residual_information, not_applicable

QUESTION = "Do residuals look normal?"
METHOD = "Anderson-Darling A² (mean and SD estimated) with D'Agostino & Stephens p-value"
MIN_RUNS = 8  # the p-value pieces of D'Agostino & Stephens (1986) are tabled from n = 8


def anderson_darling(x: np.ndarray) -> tuple[float, float, float]:
    """(A², A*, p) for normality with estimated mean and SD.

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
    return a2, float(a_star), float(min(max(p, 0.0), 1.0))


def check_normality(ctx: CheckContext) -> CheckResult:
    """Anderson–Darling on the raw residuals of runs not fitted exactly (leverage below 1)."""
    chart = "normal_probability"
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable("normality", QUESTION, METHOD, chart, reason)
    usable = ctx.resid.leverage < 1 - 1e-8
    e = ctx.resid.raw[usable]
    if len(e) < MIN_RUNS:
        return not_applicable("normality", QUESTION, METHOD, chart,
                              f"not applicable: {len(e)} usable residuals are fewer than the "
                              f"{MIN_RUNS} the Anderson-Darling p-value needs")
    a2, a_star, p = anderson_darling(e)
    verdict = ctx.thresholds.verdict(p)
    if verdict == "pass":
        msg = "Residuals are consistent with a normal distribution."
    else:
        msg = ("Residuals depart from a normal distribution: look at the normal probability "
               "plot for outliers or skew, and consider a transformation of the response.")
    centred = e - e.mean()
    m2 = float(np.mean(centred**2))
    skew = float(np.mean(centred**3)) / m2**1.5 if m2 > 0 else None
    return CheckResult("normality", QUESTION, METHOD, a2, p, verdict, (), msg, chart,
                       {"a_star": a_star, "n": int(len(e)), "skewness": skew})
