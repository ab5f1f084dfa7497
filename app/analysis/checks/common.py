"""What every residual check shares: the result record, the context it reads, helper tests."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special

from ..design import DesignInfo
from ..fit import LeastSquares
from ..residuals import ResidualSet
from ..spec import Thresholds


@dataclass(frozen=True)
class CheckResult:
    """One residual check: id, method, statistic, p-value, verdict, flagged rows, one sentence."""

    id: str
    question: str
    method: str
    statistic: float | None
    p_value: float | None
    verdict: str
    runs: tuple[int, ...]
    message: str
    chart: str
    details: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "question": self.question, "method": self.method,
                "statistic": self.statistic, "p_value": self.p_value, "verdict": self.verdict,
                "runs": list(self.runs), "message": self.message, "chart": self.chart,
                "details": dict(self.details)}


@dataclass(frozen=True)
class CheckContext:
    """Everything a check may read about the fit (included runs only, in table order)."""

    rows: np.ndarray                 # row numbers of the runs in the fit
    ls: LeastSquares
    resid: ResidualSet
    coded: np.ndarray                # n x k coded factor settings
    factor_names: tuple[str, ...]
    design: DesignInfo
    groups: np.ndarray               # replicate-group label per run
    thresholds: Thresholds
    run_order: np.ndarray | None     # run-order values, or None when not recorded
    covariates: dict[str, tuple[str, np.ndarray]]  # name -> (kind, values)
    has_square_terms: bool
    model_factor_set: frozenset[int]  # factors appearing in the model


def not_applicable(check_id: str, question: str, method: str, chart: str, reason: str,
                   details: dict | None = None) -> CheckResult:
    """A check that could not be judged; ``reason`` says why (it is shown to the approver)."""
    return CheckResult(check_id, question, method, None, None, "not_applicable", (), reason,
                       chart, details or {})


def no_residual_information(ctx: CheckContext) -> str | None:
    """The reason residual checks cannot run, or None when they can."""
    if ctx.ls.df_resid <= 0:
        return ("not applicable: the model is saturated, so there are no residual degrees of "
                "freedom; judge the effects with the half-normal plot and Lenth's margins")
    if ctx.ls.exact_fit or not (np.isfinite(ctx.ls.s) and ctx.ls.s > 0):
        return "not applicable: the model fits every run exactly (residual SD is zero)"
    return None


def added_columns_test(ctx: CheckContext, z: np.ndarray) -> tuple[float, int, int, float] | None:
    """F test for adding columns ``z`` to the fitted model, without refitting from scratch.

    The new columns are projected off the model space (z - Q Q'z); the extra SS is the squared
    length of the residual's projection onto what remains. Returns (F, df1, df2, p), or None when
    the columns add nothing the model does not already span, or leave no residual df.
    """
    q, e = ctx.ls.q, ctx.ls.residuals
    z = np.atleast_2d(np.asarray(z, dtype=float).T).T
    z_res = z - q @ (q.T @ z)
    norms = np.linalg.norm(z, axis=0)
    norms[norms == 0] = 1.0
    u, sv, _ = np.linalg.svd(z_res / norms, full_matrices=False)
    keep = sv > 1e-8 * max(1.0, float(sv.max()) if len(sv) else 1.0)
    df1 = int(keep.sum())
    df2 = ctx.ls.df_resid - df1
    if df1 == 0 or df2 <= 0:
        return None
    proj = u[:, keep].T @ e
    extra = float(proj @ proj)
    rest = max(ctx.ls.sse - extra, 0.0)
    if rest <= 0:
        return float("inf"), df1, df2, 0.0
    f = (extra / df1) / (rest / df2)
    return f, df1, df2, float(special.fdtrc(df1, df2, f))


def level_indicators(values: np.ndarray, max_levels: int = 12) -> np.ndarray | None:
    """Indicator columns for the distinct values, or None when there are too many levels."""
    levels, codes = np.unique(np.round(values, 9), return_inverse=True)
    if len(levels) > max_levels:
        return None
    return (codes.ravel()[:, None] == np.arange(len(levels))[None, :]).astype(float)


def level_groups(values: np.ndarray, max_levels: int = 12, bins: int = 4) -> np.ndarray:
    """Group labels: the distinct levels, or quartile bins for a many-valued column."""
    levels, codes = np.unique(np.round(values, 9), return_inverse=True)
    if len(levels) <= max_levels:
        return codes.ravel()
    edges = np.quantile(values, np.linspace(0, 1, bins + 1)[1:-1])
    return np.searchsorted(edges, values, side="right")


def rows_of(ctx: CheckContext, mask: np.ndarray) -> tuple[int, ...]:
    return tuple(int(r) for r in ctx.rows[np.asarray(mask, bool)])
