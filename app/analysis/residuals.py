"""Residual kinds and influence measures in closed form (no leave-one-out refits).

Formulas (Belsley, Kuh & Welsch 1980; Cook & Weisberg 1982):
leverage h_i = sum_j Q_ij² from the thin QR factor; standardized e/s; internally studentized
r = e / (s sqrt(1 - h)); externally studentized (deleted) t = r sqrt((n - p - 1) / (n - p - r²));
Cook's D = r² h / (p (1 - h)); DFFITS = t sqrt(h / (1 - h)). Cross-checked against statsmodels'
OLSInfluence in tests/analysis/test_residuals.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fit import LeastSquares

# A run with leverage this close to 1 is fitted exactly; its residual carries no information.
EXACT_LEVERAGE = 1.0 - 1e-10


@dataclass(frozen=True)
class ResidualSet:
    raw: np.ndarray
    standardized: np.ndarray
    studentized: np.ndarray
    deleted_studentized: np.ndarray
    leverage: np.ndarray
    cooks_distance: np.ndarray
    dffits: np.ndarray


def leverage_from_q(q: np.ndarray) -> np.ndarray:
    """Diagonal of the hat matrix, h_i = ||row i of Q||²."""
    return np.einsum("ij,ij->i", q, q)


def residual_set(ls: LeastSquares) -> ResidualSet:
    """Every residual kind and influence measure for a fit; NaN where undefined.

    Undefined means: zero residual SD (an exact fit), zero residual df, or leverage 1.
    """
    e = ls.residuals
    h = leverage_from_q(ls.q)
    n, p = ls.n, ls.p
    usable = (ls.df_resid > 0) and np.isfinite(ls.s) and ls.s > 0 and not ls.exact_fit
    nan = np.full(n, np.nan)
    if not usable:
        return ResidualSet(e, nan, nan.copy(), nan.copy(), h, nan.copy(), nan.copy())
    ok = h < EXACT_LEVERAGE
    one_minus_h = np.where(ok, 1.0 - h, np.nan)
    standardized = e / ls.s
    r = np.where(ok, e / (ls.s * np.sqrt(one_minus_h)), np.nan)
    dfr = n - p
    if dfr > 1:
        # n - p - r² can round to 0 for a run that carries the whole residual SS
        denom = np.maximum(dfr - r**2, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            t = r * np.sqrt((dfr - 1) / denom)
    else:
        t = nan.copy()
    cooks = r**2 * h / (p * one_minus_h)
    dffits = t * np.sqrt(h / one_minus_h)
    return ResidualSet(e, standardized, r, t, h, cooks, dffits)
