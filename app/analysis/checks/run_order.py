"""Run-order checks: Durbin–Watson autocorrelation and the Wald–Wolfowitz runs test."""

from __future__ import annotations

import numpy as np
from scipy import special

from ..calibration import null_p_values
from ..durbin_watson import durbin_watson_test
from ..statistic import StatisticResult
from .common import (
    CheckContext,
    CheckResult,
    detection,
    judged,
    no_residual_information,
    not_applicable,
    row_medians,
    run_positions,
    simulated_p,
)

AUTO_QUESTION = "Does each residual predict the next?"
AUTO_METHOD = ("Durbin-Watson d in run order with its exact p-value for the model's own X "
               "(Imhof), one-sided for positive autocorrelation; lag-1 autocorrelation; Ljung-Box")
RAND_QUESTION = "Any runs of highs or lows, drift over time?"
RAND_METHOD = ("Wald-Wolfowitz runs test about the median of the studentized residuals, in run "
               "order; residuals equal to the median are set aside (a common convention); p "
               "from this design's own null distribution")
# A residual within this fraction of the largest |residual| of the median counts as equal to it:
# identical replicates give residuals that differ only by rounding.
TIE_TOLERANCE = 1e-9
NO_ORDER = "not applicable: run order was not recorded"
EXACT_RUNS_LIMIT = 200


def ljung_box(x: np.ndarray, lags: int) -> StatisticResult:
    """Ljung–Box Q = n(n+2) sum_k r_k² / (n - k) on mean-removed x, chi-square with ``lags`` df.

    Verified against R Box.test and statsmodels acorr_ljungbox.
    """
    x = np.asarray(x, dtype=float) - np.mean(x)
    n = len(x)
    denom = float(x @ x)
    r = np.array([float(x[k:] @ x[:-k]) / denom for k in range(1, lags + 1)])
    q = float(n * (n + 2) * np.sum(r**2 / (n - np.arange(1, lags + 1))))
    return StatisticResult(q, float(special.chdtrc(lags, q)), (lags,), "Ljung-Box, chi-square")


def _log_comb(a: np.ndarray | int, b: np.ndarray | int) -> np.ndarray:
    return (special.gammaln(np.asarray(a) + 1) - special.gammaln(np.asarray(b) + 1)
            - special.gammaln(np.asarray(a) - np.asarray(b) + 1))


def runs_distribution(n1: int, n2: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact null distribution of the number of runs given n1 and n2 (Wald & Wolfowitz 1940)."""
    r = np.arange(2, n1 + n2 + 1)
    total = _log_comb(n1 + n2, n1)
    probs = np.zeros(len(r))
    for idx, runs in enumerate(r):
        k = runs // 2
        if runs % 2 == 0:
            if k - 1 <= n1 - 1 and k - 1 <= n2 - 1:
                probs[idx] = 2 * np.exp(_log_comb(n1 - 1, k - 1) + _log_comb(n2 - 1, k - 1) - total)
        else:
            terms = 0.0
            if k <= n1 - 1 and k - 1 <= n2 - 1:
                terms += np.exp(_log_comb(n1 - 1, k) + _log_comb(n2 - 1, k - 1) - total)
            if k - 1 <= n1 - 1 and k <= n2 - 1:
                terms += np.exp(_log_comb(n1 - 1, k - 1) + _log_comb(n2 - 1, k) - total)
            probs[idx] = terms
    return r, probs


def runs_test(x: np.ndarray, cutoff: float | None = None,
              exact: bool | None = None) -> StatisticResult:
    """Wald–Wolfowitz runs test about ``cutoff`` (default the median), two-sided.

    A value counts as "above" when x >= cutoff, otherwise "below", as statsmodels'
    runstest_1samp does (checked against it in tests/analysis/test_reference_diagnostics.py).
    ``exact`` (default: n <= 200) uses the exact conditional distribution of the number of runs;
    otherwise z = (R - mu) / sigma without continuity correction. The statistic is the number
    of runs; the extras hold n_above, n_below, cutoff, z, expected and exact.
    """
    x = np.asarray(x, dtype=float)
    cut = float(np.median(x)) if cutoff is None else cutoff
    above = x >= cut
    n1, n2 = int(above.sum()), int((~above).sum())
    n = n1 + n2
    n_runs = int(1 + np.sum(above[1:] != above[:-1]))
    method = "Wald-Wolfowitz runs test"
    out = {"n_above": n1, "n_below": n2, "cutoff": cut}
    if n1 == 0 or n2 == 0:
        out.update(z=None, exact=False, expected=None)
        return StatisticResult(float(n_runs), None, (), method, out)
    mu = 2.0 * n1 * n2 / n + 1.0
    var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n**2 * (n - 1.0))
    z = (n_runs - mu) / np.sqrt(var) if var > 0 else 0.0
    use_exact = (n <= EXACT_RUNS_LIMIT) if exact is None else exact
    if use_exact:
        r, probs = runs_distribution(n1, n2)
        low = float(probs[r <= n_runs].sum())
        high = float(probs[r >= n_runs].sum())
        p = min(1.0, 2.0 * min(low, high))
    else:
        p = float(2.0 * special.ndtr(-abs(z)))
    out.update(z=float(z), exact=bool(use_exact), expected=float(mu))
    return StatisticResult(float(n_runs), p, (), method, out)


def check_autocorrelation(ctx: CheckContext) -> CheckResult:
    cid, chart = "run_order_autocorrelation", "run_order"
    if ctx.run_order is None:
        return not_applicable(cid, AUTO_QUESTION, AUTO_METHOD, chart, NO_ORDER)
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, AUTO_QUESTION, AUTO_METHOD, chart, reason)
    if ctx.ls.df_resid < 2:
        return not_applicable(cid, AUTO_QUESTION, AUTO_METHOD, chart,
                              "not applicable: fewer than 2 residual degrees of freedom")
    order = ctx.in_run_order
    e = ctx.ls.residuals[order]
    dw = durbin_watson_test(e, ctx.ls.q[order])
    lag1 = float(np.sum(e[1:] * e[:-1]) / np.sum(e**2))
    n = len(e)
    lags = max(1, min(10, n // 5))
    p_two_sided, p_negative = dw.extras["p_two_sided"], dw.extras["p_negative"]
    details = {"dw_p_two_sided": p_two_sided, "dw_p_negative": p_negative,
               "dw_method": dw.method, "lag1_autocorrelation": lag1}
    if n > lags + 1:
        lb = ljung_box(e, lags)
        details.update(ljung_box_q=lb.statistic, ljung_box_lags=lags, ljung_box_p=lb.pvalue)
    details["p_method"] = dw.method
    null_p = None
    if ctx.null is not None:
        # each draw's p for the min-P step: its rank in the draws' own d (small d = worse)
        ez = ctx.null.residuals[:, order]
        d = np.sum(np.diff(ez, axis=1) ** 2, axis=1) / np.sum(ez**2, axis=1)
        null_p = null_p_values(-d)

        def minus_d(e: np.ndarray) -> np.ndarray:
            e = e[:, order]
            return -np.sum(np.diff(e, axis=1) ** 2, axis=1) / np.sum(e**2, axis=1)

        details.update(detection(ctx, -d, minus_d, "ar1", position=run_positions(ctx)))
    good = "No sign that consecutive runs carry over into each other."
    bad = ("Consecutive residuals move together (positive autocorrelation): something "
           "carried over between runs in time. Check for drift, warm-up or a missing "
           "time-related variable before trusting the p-values of the fit.")
    if p_two_sided < ctx.thresholds.review and p_negative < dw.pvalue:
        good += " Residuals alternate in sign more than chance allows (see the two-sided p)."
    return judged(cid, AUTO_QUESTION, AUTO_METHOD, chart, ctx, dw.statistic, dw.pvalue,
                  good, bad, null_p=null_p, details=details)


def runs_about_median(r: np.ndarray) -> np.ndarray:
    """|R − μ| / σ for each row of ``r`` (in run order), ties with the median set aside.

    R counts runs of residuals above and below the row's median; μ and σ are the Wald &
    Wolfowitz (1940) moments for the numbers above (n₁) and below (n₂).
    """
    r = np.atleast_2d(np.asarray(r, dtype=float))
    med = row_medians(r)
    tol = TIE_TOLERANCE * np.max(np.abs(r), axis=1, keepdims=True)
    sign = np.where(r > med + tol, 1, np.where(r < med - tol, -1, 0))
    # carry the last non-tied sign forward so a tie neither starts nor breaks a run
    idx = np.where(sign != 0, np.arange(r.shape[1]), 0)
    np.maximum.accumulate(idx, axis=1, out=idx)
    carried = np.take_along_axis(sign, idx, axis=1)
    changes = np.sum((carried[:, 1:] != carried[:, :-1]) & (carried[:, :-1] != 0), axis=1)
    n1 = np.sum(sign > 0, axis=1).astype(float)
    n2 = np.sum(sign < 0, axis=1).astype(float)
    n = n1 + n2
    with np.errstate(divide="ignore", invalid="ignore"):
        mu = 2.0 * n1 * n2 / n + 1.0
        var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n**2 * (n - 1.0))
        return np.where(var > 0, np.abs(1.0 + changes - mu) / np.sqrt(var), 0.0)


def check_randomness(ctx: CheckContext) -> CheckResult:
    cid, chart = "run_order_randomness", "run_order"
    if ctx.run_order is None:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart, NO_ORDER)
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart, reason)
    order = ctx.in_run_order
    usable = ctx.usable[order]
    scale = 1.0 / np.sqrt(1.0 - ctx.resid.leverage[order][usable])
    r = ctx.resid.studentized[order][usable]
    med = float(np.median(r))
    untied = np.abs(r - med) > TIE_TOLERANCE * float(np.max(np.abs(r)))
    runs = runs_test(r[untied], cutoff=med)
    if runs.pvalue is None:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart,
                              "not applicable: every residual lies on one side of the median")
    result = {"n_runs": int(runs.statistic), **runs.extras,
              "ties_set_aside": int((~untied).sum())}

    def statistic(e: np.ndarray) -> np.ndarray:
        return runs_about_median(e[:, order][:, usable] * scale)

    p, null_p, details = simulated_p(ctx, statistic, textbook_p=runs.pvalue, defect="drift",
                                     position=run_positions(ctx))
    result.update(details)
    if result["n_runs"] < result["expected"]:
        bad = ("Residuals stay above or below their median for long stretches of run order: "
               "look for drift or a shift over time (tool wear, a new lot, ambient change).")
    else:
        bad = ("Residuals alternate about their median more often than chance; check how runs "
               "were sequenced.")
    return judged(cid, RAND_QUESTION, RAND_METHOD, chart, ctx, float(result["n_runs"]), p,
                  "Residuals cross their median about as often as random order would.", bad,
                  null_p=null_p, details=result)
