"""Least squares by Householder QR with column scaling, and the coefficient table.

The core never forms X'X: coefficients come from R b = Q'y on a column-scaled matrix, which keeps
the NIST StRD "higher difficulty" problems (Longley, Wampler, Filip) accurate (see
tests/analysis/test_reference_nist.py for the digits reached).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, special

from .spec import AnalysisError

RANK_TOL = 1e-9
EXACT_FIT_RTOL = 1e-11


@dataclass(frozen=True)
class LeastSquares:
    """A fitted least-squares problem.

    ``q`` is the thin n x p orthonormal factor, ``r_inv`` the inverse of R for the scaled matrix,
    ``scale`` the column norms used; ``xtx_inv`` = (X'X)^-1 in the original columns.
    """

    coef: np.ndarray
    fitted: np.ndarray
    residuals: np.ndarray
    q: np.ndarray
    xtx_inv: np.ndarray
    sse: float
    df_resid: int
    s: float
    n: int
    p: int
    exact_fit: bool = False


def _column_norms(x: np.ndarray) -> np.ndarray:
    """Euclidean length of each column, without an n x p temporary."""
    return np.sqrt(np.einsum("ij,ij->j", x, x))


def scaled_qr(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thin QR of the column-scaled matrix: (Q, R, column norms)."""
    scale = _column_norms(x)
    scale[scale == 0] = 1.0
    # LAPACK's Householder QR works on a column-major copy in place; numpy's wrapper would
    # transpose and copy a row-major matrix more than once (several times slower at 100k runs).
    scaled = np.array(x, dtype=float, order="F")
    scaled /= scale
    q, r = linalg.qr(scaled, mode="economic", overwrite_a=True, check_finite=False)
    return q, r, scale


def dependent_columns(x: np.ndarray, rank_tol: float = RANK_TOL,
                      r: np.ndarray | None = None) -> list[tuple[int, list[int]]]:
    """Columns that are (numerically) linear combinations of earlier columns.

    Returns (column, [earlier columns it depends on]) pairs, judged by |R_jj| of an unpivoted QR
    of the column-scaled matrix (``r`` when already computed): in exact arithmetic that is the
    sine of the angle between x_j and the span of the columns before it.
    """
    norms = _column_norms(x)
    zero = norms == 0
    norms[zero] = 1.0
    if r is None:
        r = np.linalg.qr(x / norms, mode="r")
    diag = np.abs(np.diag(r))
    out = []
    independent: list[int] = []
    for j in range(x.shape[1]):
        if diag[j] < rank_tol or zero[j]:
            if independent:
                sol, *_ = np.linalg.lstsq(x[:, independent] / norms[independent],
                                          x[:, j] / norms[j], rcond=None)
                partners = [independent[i] for i in np.flatnonzero(np.abs(sol) > 1e-6)]
            else:
                partners = []
            out.append((j, partners))
        else:
            independent.append(j)
    return out


def least_squares(x: np.ndarray, y: np.ndarray, *, check_rank: bool = True,
                  qr: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> LeastSquares:
    """Ordinary least squares by QR of the column-scaled model matrix.

    Parameters
    ----------
    x : (n, p) model matrix; y : (n,) response.
    check_rank : raise :class:`AnalysisError` when a column depends on earlier ones.
    qr : the :func:`scaled_qr` of ``x`` when the caller already has it.

    Verified against all NIST StRD linear regression sets and statsmodels OLS.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    n, p = x.shape
    if n < p:
        raise AnalysisError(f"{n} runs are fewer than the {p} model columns")
    q, r, scale = scaled_qr(x) if qr is None else qr
    if check_rank:
        dep = dependent_columns(x, r=r)
        if dep:
            raise AnalysisError(f"Model matrix is rank-deficient in columns {dep}")
    qty = q.T @ y
    coef_scaled = linalg.solve_triangular(r, qty)
    # One step of refinement on the residual of the original columns recovers digits lost in
    # ill-conditioned problems (Björck's semi-normal correction).
    correction = linalg.solve_triangular(r, q.T @ (y - x @ (coef_scaled / scale)))
    coef_scaled = coef_scaled + correction
    coef = coef_scaled / scale
    fitted = x @ coef
    residuals = y - fitted
    sse = float(residuals @ residuals)
    df_resid = n - p
    s = float(np.sqrt(sse / df_resid)) if df_resid > 0 else float("nan")
    # Residuals at rounding level relative to the response mean the model fits exactly
    # (NIST Wampler1/2): no residual-based statistic carries information then.
    exact_fit = df_resid > 0 and s <= EXACT_FIT_RTOL * max(float(np.abs(y).max()), 1e-300)
    r_inv = linalg.solve_triangular(r, np.eye(p))
    xtx_inv = (r_inv @ r_inv.T) / np.outer(scale, scale)
    return LeastSquares(coef, fitted, residuals, q, xtx_inv, sse, df_resid, s, n, p, exact_fit)


@dataclass(frozen=True)
class CoefficientTable:
    """Coefficient estimates with standard errors, t, p, 95 % CI and VIF (arrays by column)."""

    estimate: np.ndarray
    std_error: np.ndarray
    t_value: np.ndarray
    p_value: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    vif: np.ndarray


def coefficient_table(ls: LeastSquares, x: np.ndarray, level: float = 0.95) -> CoefficientTable:
    """SE = s sqrt(diag (X'X)^-1); t against 0 with n - p df; VIF_j = (X'X)^-1_jj * S_jj.

    S_jj is the centred sum of squares of column j, so VIF is 1 for an orthogonal column; the
    intercept has no VIF (NaN). With zero residual df, or a residual SD that is zero next to the
    response (``ls.exact_fit``: a constant response, a perfect fit), SE, t, p and CI are NaN
    (None in the document, shown as —): rounding residue would otherwise pass for a p-value.
    """
    if ls.df_resid > 0 and not ls.exact_fit and ls.s > 0:
        se = ls.s * np.sqrt(np.diag(ls.xtx_inv))
        t = ls.coef / se
        p_val = 2 * special.stdtr(ls.df_resid, -np.abs(t))
        half = special.stdtrit(ls.df_resid, 0.5 + level / 2) * se
    else:
        se = t = p_val = half = np.full(ls.p, np.nan)
    centred = x - x.mean(axis=0)
    centred_ss = np.einsum("ij,ij->j", centred, centred)
    del centred
    vif = np.where(centred_ss > 1e-12 * np.maximum(1.0, np.einsum("ij,ij->j", x, x)),
                   np.diag(ls.xtx_inv) * centred_ss, np.nan)
    return CoefficientTable(ls.coef, se, t, p_val, ls.coef - half, ls.coef + half, vif)


def fit_statistics(ls: LeastSquares, y: np.ndarray, leverage: np.ndarray) -> dict[str, float]:
    """R², adjusted R², predicted R² from PRESS = sum (e / (1 - h))², residual SD."""
    sst = float(np.sum((y - y.mean()) ** 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        press_terms = ls.residuals / (1.0 - leverage)
    press = float(np.sum(press_terms**2)) if np.all(leverage < 1 - 1e-10) else float("nan")
    r2 = 1.0 - ls.sse / sst if sst > 0 else float("nan")
    adj = (1.0 - (ls.sse / ls.df_resid) / (sst / (ls.n - 1))
           if ls.df_resid > 0 and sst > 0 else float("nan"))
    pred = 1.0 - press / sst if sst > 0 and np.isfinite(press) else float("nan")
    return {"r_squared": r2, "adj_r_squared": adj, "pred_r_squared": pred, "s": ls.s,
            "press": press, "sse": ls.sse, "df_resid": ls.df_resid, "n": ls.n, "p": ls.p}
