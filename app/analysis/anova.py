"""ANOVA by term with adjusted (Type III) sums of squares, lack of fit and pure error.

Which sums of squares: each term's SS is the rise in residual SS when that term alone is dropped
from the full model, with the model in coded units (so x and x² are nearly orthogonal and "A
adjusted for A:B" is meaningful). SS_T = b_T' [V_TT]^-1 b_T with V = (X'X)^-1, no refit needed.
For orthogonal designs this equals the sequential (Type I) SS. Blocks enter first: the Block row is
the sequential SS of the blocks after the mean, and the Model row is the SS of all terms after
blocks. Verified against the NIST StRD one-way ANOVA sets and linear regression ANOVA pieces.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .fit import LeastSquares

SS_METHOD = (
    "adjusted (Type III) sums of squares in coded units: each term's SS is the increase in "
    "residual SS when that term alone is dropped; blocks are entered first (sequential)"
)


def _f_row(source: str, df: int, ss: float, ms_error: float, df_error: int) -> dict:
    ms = ss / df if df > 0 else float("nan")
    if df > 0 and df_error > 0 and ms_error > 0:
        f = ms / ms_error
        p = float(special.fdtrc(df, df_error, f))
    elif df > 0 and df_error > 0 and ms_error == 0 and ss > 0:
        f, p = float("inf"), 0.0
    else:
        f, p = float("nan"), float("nan")
    return {"source": source, "df": int(df), "sum_sq": float(ss), "mean_sq": float(ms),
            "f_value": float(f), "p_value": p}


def group_ss(ls: LeastSquares, columns: list[int]) -> float:
    """Adjusted SS for a group of columns: b' inv(V) b over those columns."""
    b = ls.coef[columns]
    v = ls.xtx_inv[np.ix_(columns, columns)]
    return float(b @ np.linalg.solve(v, b))


def pure_error(y: np.ndarray, groups: np.ndarray) -> tuple[float, int]:
    """Within-group SS and df over runs sharing the same settings (and block)."""
    counts = np.bincount(groups)
    sums = np.bincount(groups, weights=y)
    means = sums / counts
    ss = float(np.sum((y - means[groups]) ** 2))
    return ss, int(np.sum(counts - 1))


def anova_table(
    ls: LeastSquares,
    x: np.ndarray,
    y: np.ndarray,
    term_columns: list[tuple[str, list[int]]],
    block_columns: list[int],
    groups: np.ndarray | None,
    block_label: str = "Block",
) -> list[dict]:
    """Rows: Block (if any), Model, one per term, Residual, Lack of fit, Pure error, Total.

    Lack of fit and pure error appear when replicated settings leave pure-error df; the lack-of-
    fit F is MS_LOF / MS_PE. Term and model F use the residual mean square.
    """
    sst = float(np.sum((y - y.mean()) ** 2))
    df_total = ls.n - 1
    ms_e = ls.sse / ls.df_resid if ls.df_resid > 0 else float("nan")
    rows = []
    if block_columns:
        within = _within_block_ss(y, x, block_columns)
        rows.append(_f_row(block_label, len(block_columns), sst - within, ms_e, ls.df_resid))
        reduced_sse = within
    else:
        reduced_sse = sst
    model_df = sum(len(c) for _, c in term_columns)
    rows.append(_f_row("Model", model_df, max(reduced_sse - ls.sse, 0.0), ms_e, ls.df_resid))
    for name, cols in term_columns:
        rows.append(_f_row(name, len(cols), group_ss(ls, cols), ms_e, ls.df_resid))
    rows.append(_f_row("Residual", ls.df_resid, ls.sse, float("nan"), 0))
    if groups is not None:
        pe_ss, pe_df = pure_error(y, groups)
        lof_df = ls.df_resid - pe_df
        if pe_df > 0 and lof_df > 0:
            lof_ss = max(ls.sse - pe_ss, 0.0)
            rows.append(_f_row("Lack of fit", lof_df, lof_ss, pe_ss / pe_df, pe_df))
            rows.append(_f_row("Pure error", pe_df, pe_ss, float("nan"), 0))
    rows.append(_f_row("Total (corrected)", df_total, sst, float("nan"), 0))
    return rows


def _within_block_ss(y: np.ndarray, x: np.ndarray, block_columns: list[int]) -> float:
    """Residual SS of y on the intercept and block columns only (the blocks-first baseline).

    Block columns are effect-coded indicators, so that fit is the within-block spread.
    """
    _, labels = np.unique(np.round(x[:, block_columns], 9), axis=0, return_inverse=True)
    labels = labels.ravel()
    means = np.bincount(labels, weights=y) / np.bincount(labels)
    return float(np.sum((y - means[labels]) ** 2))
