"""Run-order checks: Durbin–Watson autocorrelation and the Wald–Wolfowitz runs test."""

from __future__ import annotations

import numpy as np
from scipy import special, stats

from ..durbin_watson import durbin_watson_test
from .common import CheckContext, CheckResult, no_residual_information, not_applicable

AUTO_QUESTION = "Does each residual predict the next?"
AUTO_METHOD = ("Durbin-Watson d in run order with its exact p-value for the model's own X "
               "(Imhof), one-sided for positive autocorrelation; lag-1 autocorrelation; Ljung-Box")
RAND_QUESTION = "Any runs of highs or lows, drift over time?"
RAND_METHOD = "Wald-Wolfowitz runs test about the median, in run order"
NO_ORDER = "not applicable: run order was not recorded"
EXACT_RUNS_LIMIT = 200


def ljung_box(x: np.ndarray, lags: int) -> tuple[float, float]:
    """Ljung–Box Q = n(n+2) sum_k r_k² / (n - k) on mean-removed x, chi-square with ``lags`` df.

    Verified against R Box.test and statsmodels acorr_ljungbox.
    """
    x = np.asarray(x, dtype=float) - np.mean(x)
    n = len(x)
    denom = float(x @ x)
    r = np.array([float(x[k:] @ x[:-k]) / denom for k in range(1, lags + 1)])
    q = float(n * (n + 2) * np.sum(r**2 / (n - np.arange(1, lags + 1))))
    return q, float(special.chdtrc(lags, q))


def _log_comb(a: np.ndarray | int, b: np.ndarray | int) -> np.ndarray:
    return special.gammaln(np.asarray(a) + 1) - special.gammaln(np.asarray(b) + 1) - special.gammaln(
        np.asarray(a) - np.asarray(b) + 1)


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


def runs_test(x: np.ndarray, cutoff: float | None = None, exact: bool | None = None) -> dict:
    """Wald–Wolfowitz runs test about ``cutoff`` (default the median), two-sided.

    A value counts as "above" when x >= cutoff, otherwise "below", as statsmodels'
    runstest_1samp does (checked against it in tests/analysis/test_reference_diagnostics.py).
    ``exact`` (default: n <= 200) uses the exact conditional distribution of the number of runs;
    otherwise z = (R - mu) / sigma without continuity correction.
    """
    x = np.asarray(x, dtype=float)
    cut = float(np.median(x)) if cutoff is None else cutoff
    above = x >= cut
    n1, n2 = int(above.sum()), int((~above).sum())
    n = n1 + n2
    n_runs = int(1 + np.sum(above[1:] != above[:-1]))
    out = {"n_runs": n_runs, "n_above": n1, "n_below": n2, "cutoff": cut}
    if n1 == 0 or n2 == 0:
        out.update(z=None, p_value=None, exact=False, expected=None)
        return out
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
        p = float(2.0 * stats.norm.sf(abs(z)))
    out.update(z=float(z), p_value=p, exact=bool(use_exact), expected=float(mu))
    return out


def _in_run_order(ctx: CheckContext) -> np.ndarray:
    return np.argsort(ctx.run_order, kind="stable")


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
    order = _in_run_order(ctx)
    e = ctx.ls.residuals[order]
    dw = durbin_watson_test(e, ctx.ls.q[order])
    lag1 = float(np.sum(e[1:] * e[:-1]) / np.sum(e**2))
    n = len(e)
    lags = max(1, min(10, n // 5))
    details = {"dw_p_two_sided": dw.p_two_sided, "dw_p_negative": dw.p_negative,
               "dw_method": dw.method, "lag1_autocorrelation": lag1}
    if n > lags + 1:
        q, q_p = ljung_box(e, lags)
        details.update(ljung_box_q=q, ljung_box_lags=lags, ljung_box_p=q_p)
    verdict = ctx.thresholds.verdict(dw.p_positive)
    if verdict == "pass":
        msg = "No sign that consecutive runs carry over into each other."
    else:
        msg = ("Consecutive residuals move together (positive autocorrelation): something "
               "carried over between runs in time. Check for drift, warm-up or a missing "
               "time-related variable before trusting the p-values of the fit.")
    if dw.p_two_sided < ctx.thresholds.review and dw.p_negative < dw.p_positive:
        msg += " Residuals alternate in sign more than chance allows (see the two-sided p)."
    return CheckResult(cid, AUTO_QUESTION, AUTO_METHOD, dw.statistic, dw.p_positive, verdict,
                       (), msg, chart, details)


def check_randomness(ctx: CheckContext) -> CheckResult:
    cid, chart = "run_order_randomness", "run_order"
    if ctx.run_order is None:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart, NO_ORDER)
    reason = no_residual_information(ctx)
    if reason:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart, reason)
    order = _in_run_order(ctx)
    result = runs_test(ctx.ls.residuals[order])
    if result["p_value"] is None:
        return not_applicable(cid, RAND_QUESTION, RAND_METHOD, chart,
                              "not applicable: every residual lies on one side of the median")
    p = result["p_value"]
    verdict = ctx.thresholds.verdict(p)
    if verdict == "pass":
        msg = "Residuals cross their median about as often as random order would."
    elif result["n_runs"] < result["expected"]:
        msg = ("Residuals stay above or below their median for long stretches of run order: "
               "look for drift or a shift over time (tool wear, a new lot, ambient change).")
    else:
        msg = "Residuals alternate about their median more often than chance; check how runs were sequenced."
    return CheckResult(cid, RAND_QUESTION, RAND_METHOD, float(result["n_runs"]), p, verdict, (),
                       msg, chart, result)
