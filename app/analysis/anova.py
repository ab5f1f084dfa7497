"""ANOVA by term with adjusted (Type III) sums of squares; the residual split into centre-point
curvature, lack of fit and pure error.

Which sums of squares: each term's SS is the rise in residual SS when that term alone is dropped
from the full model, with the model in coded units (so x and x² are nearly orthogonal and "A
adjusted for A:B" is meaningful). SS_T = b_T' [V_TT]^-1 b_T with V = (X'X)^-1, no refit needed.
For orthogonal designs this equals the sequential (Type I) SS. Blocks enter first: the Block row is
the sequential SS of the blocks after the mean, and the Model row is the SS of all terms after
blocks. Verified against the NIST StRD one-way ANOVA sets and linear regression ANOVA pieces, and
the curvature split against statsmodels anova_lm with a centre-point indicator added.

How the rows add up: each row's ``part_of`` names the row it and its siblings add up to, in SS
and df. Block + Model + Residual = Total; Curvature + Residual after curvature = Residual; Lack of
fit + Pure error = the residual they split. Term rows have ``part_of`` None: adjusted SS add up
to the Model row only when the design is orthogonal. Every F names its denominator row in
``f_denominator``.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .design import DesignInfo
from .fit import EXACT_FIT_RTOL, LeastSquares

SS_METHOD = (
    "adjusted (Type III) sums of squares in coded units: each term's SS is the increase in "
    "residual SS when that term alone is dropped; blocks are entered first (sequential); "
    "each F uses the mean square of the row it names"
)
TOTAL = "Total (corrected)"
RESIDUAL = "Residual"
CURVATURE = "Curvature (centre points)"
AFTER_CURVATURE = "Residual after curvature"
LACK_OF_FIT = "Lack of fit"
PURE_ERROR = "Pure error"
TWO_LEVEL_KINDS = ("two_level_full_factorial", "two_level_fractional_factorial")


def _row(source: str, df: int, ss: float, part_of: str | None,
         denominator: tuple[str, float, int] | None = None, zero_ms: float = 0.0) -> dict:
    """One row; ``denominator`` is (row name, its mean square, its df) for the F test.

    A denominator mean square at or below ``zero_ms`` (rounding next to the response) leaves
    F and p undefined (NaN, shown as —): a perfect fit carries no test.
    """
    ms = ss / df if df > 0 else float("nan")
    f, p, named = float("nan"), float("nan"), None
    if denominator is not None and df > 0:
        name, ms_den, df_den = denominator
        if df_den > 0 and np.isfinite(ms_den) and ms_den > zero_ms:
            f, named = ms / ms_den, name
            p = float(special.fdtrc(df, df_den, f))
    return {"source": source, "df": int(df), "sum_sq": float(ss), "mean_sq": float(ms),
            "f_value": float(f), "p_value": p, "f_denominator": named, "part_of": part_of}


def group_ss(ls: LeastSquares, columns: list[int]) -> float:
    """Adjusted SS for a group of columns: b' inv(V) b over those columns."""
    b = ls.coef[columns]
    v = ls.xtx_inv[np.ix_(columns, columns)]
    return float(b @ np.linalg.solve(v, b))


def term_p_value(ls: LeastSquares, columns: list[int]) -> float:
    """p of the term's F test (its adjusted SS over its df, against the residual mean square);
    for one column it is the coefficient's two-sided t-test p (F = t²). NaN without residual
    information."""
    if ls.df_resid <= 0 or ls.exact_fit or not ls.sse > 0:
        return float("nan")
    f = group_ss(ls, columns) / len(columns) / (ls.sse / ls.df_resid)
    return float(special.fdtrc(len(columns), ls.df_resid, f))


def pure_error(y: np.ndarray, groups: np.ndarray) -> tuple[float, int]:
    """Within-group SS and df over runs sharing the same settings (and block)."""
    counts = np.bincount(groups)
    sums = np.bincount(groups, weights=y)
    means = sums / counts
    ss = float(np.sum((y - means[groups]) ** 2))
    return ss, int(np.sum(counts - 1))


def centre_runs(design: DesignInfo, coded: np.ndarray) -> np.ndarray | None:
    """Centre runs of a two-level design that has them (the curvature split), else None."""
    if design.kind not in TWO_LEVEL_KINDS or design.n_centre == 0:
        return None
    return ~(np.abs(coded) > 1e-4).any(axis=1)


def curvature_ss(ls: LeastSquares, centre: np.ndarray) -> float | None:
    """SS of the centre-point contrast beyond the model: (w'e)² / w'w with w the centre
    indicator projected off the model space. None when the model already spans it (a square
    term) or no residual df would be left."""
    c = centre.astype(float)
    w = c - ls.q @ (ls.q.T @ c)
    ww = float(w @ w)
    if ww <= 1e-12 * float(c @ c) or ls.df_resid < 2:
        return None
    return float(w @ ls.residuals) ** 2 / ww


def anova_table(
    ls: LeastSquares,
    x: np.ndarray,
    y: np.ndarray,
    term_columns: list[tuple[str, list[int]]],
    block_columns: list[int],
    groups: np.ndarray | None,
    block_label: str = "Block",
    centre: np.ndarray | None = None,
) -> list[dict]:
    """Rows: Block (if any), Model, one per term, Residual and its split, Total.

    The Residual is split into Curvature (centre points) and Residual after curvature when
    ``centre`` marks the centre runs of a two-level design and the model lacks a square term;
    the residual (after curvature, when split) is split into Lack of fit and Pure error when
    replicated settings leave df for both. Term, Block and Model F use the Residual mean square
    (so F = t² for one-df terms); curvature F uses Residual after curvature; lack of fit F uses
    Pure error.
    """
    sst = float(np.sum((y - y.mean()) ** 2))
    df_total = ls.n - 1
    # A mean square at rounding level next to the response's size is zero: no F test then.
    zero_ms = (EXACT_FIT_RTOL * max(float(np.abs(y).max()), 1e-300)) ** 2
    ms_e = ls.sse / ls.df_resid if ls.df_resid > 0 and not ls.exact_fit else float("nan")
    residual = (RESIDUAL, ms_e, ls.df_resid)
    rows = []
    if block_columns:
        within = _within_block_ss(y, x, block_columns)
        rows.append(_row(block_label, len(block_columns), sst - within, TOTAL, residual, zero_ms))
        reduced_sse = within
    else:
        reduced_sse = sst
    model_df = sum(len(c) for _, c in term_columns)
    rows.append(_row("Model", model_df, max(reduced_sse - ls.sse, 0.0), TOTAL, residual, zero_ms))
    for name, cols in term_columns:
        rows.append(_row(name, len(cols), group_ss(ls, cols), None, residual, zero_ms))
    rows.append(_row(RESIDUAL, ls.df_resid, ls.sse, TOTAL))
    rest, rest_ss, rest_df = RESIDUAL, ls.sse, ls.df_resid
    curv = curvature_ss(ls, centre) if centre is not None else None
    if curv is not None:
        rest, rest_ss, rest_df = AFTER_CURVATURE, max(ls.sse - curv, 0.0), ls.df_resid - 1
        rows.append(_row(CURVATURE, 1, curv, RESIDUAL,
                         (rest, rest_ss / rest_df, rest_df), zero_ms))
        rows.append(_row(AFTER_CURVATURE, rest_df, rest_ss, RESIDUAL))
    if groups is not None:
        pe_ss, pe_df = pure_error(y, groups)
        lof_df = rest_df - pe_df
        if pe_df > 0 and lof_df > 0:
            lof_ss = max(rest_ss - pe_ss, 0.0)
            rows.append(_row(LACK_OF_FIT, lof_df, lof_ss, rest,
                             (PURE_ERROR, pe_ss / pe_df, pe_df), zero_ms))
            rows.append(_row(PURE_ERROR, pe_df, pe_ss, rest))
    rows.append(_row(TOTAL, df_total, sst, None))
    return rows


def _within_block_ss(y: np.ndarray, x: np.ndarray, block_columns: list[int]) -> float:
    """Residual SS of y on the intercept and block columns only (the blocks-first baseline).

    Block columns are effect-coded indicators, so that fit is the within-block spread.
    """
    _, labels = np.unique(np.round(x[:, block_columns], 9), axis=0, return_inverse=True)
    labels = labels.ravel()
    means = np.bincount(labels, weights=y) / np.bincount(labels)
    return float(np.sum((y - means[labels]) ** 2))
