"""What every residual check shares: the result record, the context it reads, helper tests."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
from scipy import special

from ..calibration import (
    DEFECTS,
    POWER_DRAWS,
    POWER_FLOOR,
    NullDraws,
    defect_residuals,
    detection_rate,
    null_p_values,
    upper_p,
)
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
    # The p-value adjusted across the battery of this fit; the verdict follows it.
    p_adjusted: float | None = None
    # Not stored: this check's p-value on each null draw (for the min-P adjustment), and the
    # sentence for a pass and for a flag, chosen once the adjusted p is known.
    null_p: np.ndarray | None = field(default=None, compare=False, repr=False)
    messages: tuple[str, str] | None = field(default=None, compare=False, repr=False)

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "question": self.question, "method": self.method,
                "statistic": self.statistic, "p_value": self.p_value,
                "p_adjusted": self.p_adjusted, "verdict": self.verdict,
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
    null: NullDraws | None = None    # simulated M z draws; None above the asymptotic run count
    # categorical factors by index: their level names (their coded column holds level numbers)
    levels: Mapping[int, tuple[str, ...]] = field(default_factory=dict)

    @property
    def usable(self) -> np.ndarray:
        """Runs whose residual carries information (leverage below 1)."""
        return self.resid.leverage < 1 - 1e-8

    @cached_property
    def in_run_order(self) -> np.ndarray:
        """Indices of the runs in time order (ties in the run-order column keep table order);
        sorted once for every run-order check."""
        return np.argsort(self.run_order, kind="stable")


def judged(check_id: str, question: str, method: str, chart: str, ctx: CheckContext,
           statistic: float, p_value: float, good: str, bad: str, *,
           null_p: np.ndarray | None = None, runs: tuple[int, ...] = (),
           details: dict | None = None) -> CheckResult:
    """A check with a p-value; its verdict is provisional until the battery adjusts it.

    A p-value that is not a finite number in [0, 1] fails closed: not applicable, with the
    reason, never pass.
    """
    if p_value is None or not np.isfinite(p_value) or not 0.0 <= p_value <= 1.0:
        return not_applicable(check_id, question, method, chart,
                              "not applicable: the test statistic is undefined for these "
                              "residuals", details)
    rate = (details or {}).get("detection_rate")
    if rate is not None and clearly_below_floor(rate):
        return not_applicable(
            check_id, question, method, chart,
            f"not applicable: this design cannot tell — against {details['detection_against']} "
            f"this check would flag only {rate:.0%} of experiments (false alarms alone: "
            f"{ctx.thresholds.review:.0%}), so a pass would say nothing. Judge this from the "
            "plot, or add runs", details)
    verdict = ctx.thresholds.verdict(p_value)
    return CheckResult(check_id, question, method, float(statistic), float(p_value), verdict,
                       runs, good if verdict == "pass" else bad, chart, details or {},
                       null_p=null_p, messages=(good, bad))


def clearly_below_floor(rate: float) -> bool:
    """True when the simulated detection rate is below the floor by three standard errors.

    A rate near the floor keeps the check: only a design that clearly cannot detect the defect
    is told so, and Monte Carlo error seldom splits alike factors of a symmetric design.
    """
    return rate + 3.0 * np.sqrt(rate * (1.0 - rate) / POWER_DRAWS) < POWER_FLOOR


def simulated(ctx: CheckContext, statistic, *, textbook_p: float | None = None,
              defect: str | None = None, **defect_args) -> tuple[float, float, np.ndarray | None,
                                                               dict]:
    """(observed statistic, p, null p-values, details) for ``statistic`` (larger = worse).

    ``statistic`` maps a (B × n) array of residual vectors to B values and must not depend on
    σ. With draws, p is its design-exact upper tail; without, ``textbook_p`` is used. With a
    ``defect`` (a key of calibration.DEFECTS), the details carry the share of experiments with
    that defect in which this design would let the check flag it.
    """
    observed = float(statistic(ctx.ls.residuals[None, :])[0])
    if ctx.null is None:
        return observed, textbook_p, None, {"p_method": "asymptotic (textbook) distribution"}
    null = statistic(ctx.null.residuals)
    details = {"p_method": f"simulated for this design ({ctx.null.count} draws of M z)"}
    if textbook_p is not None:
        details["p_textbook"] = textbook_p
    if defect is not None:
        details.update(detection(ctx, null, statistic, defect, **defect_args))
    return observed, upper_p(observed, null), null_p_values(null), details


def simulated_p(ctx: CheckContext, statistic, *, textbook_p: float | None = None,
                defect: str | None = None, **defect_args) -> tuple[float, np.ndarray | None,
                                                                   dict]:
    """:func:`simulated` for a check that reports a statistic of its own: (p, null p-values,
    details). Without draws (above the asymptotic run count) ``statistic`` is not evaluated:
    the textbook p stands alone, and the statistic's observed value would go unused."""
    if ctx.null is None:
        return textbook_p, None, {"p_method": "asymptotic (textbook) distribution"}
    return simulated(ctx, statistic, textbook_p=textbook_p, defect=defect, **defect_args)[1:]


def detection(ctx: CheckContext, null: np.ndarray, statistic, defect: str,
              **defect_args) -> dict:
    """How often this design lets the check flag ``defect`` at the review threshold."""
    residuals = defect_residuals(ctx.ls.q, ctx.null.seed, defect, **defect_args)
    rate = detection_rate(null, statistic(residuals), ctx.thresholds.review)
    return {"detection_rate": round(rate, 3), "detection_against": DEFECTS[defect]}


def run_positions(ctx: CheckContext) -> np.ndarray:
    """Each run's place in time, 0-based (ties in the run-order column keep table order)."""
    positions = np.empty(len(ctx.run_order), dtype=int)
    positions[ctx.in_run_order] = np.arange(len(ctx.run_order))
    return positions


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


@dataclass(frozen=True)
class AddedColumnsTest:
    """F for adding columns to the fitted model: exact under the checks' hypothesis."""

    f: float
    df1: int
    df2: int
    p_value: float
    null_p: np.ndarray | None   # the same test's p on each null draw, for the min-P step
    basis: np.ndarray           # orthonormal columns added beyond the model space


def added_columns_test(ctx: CheckContext, z: np.ndarray) -> AddedColumnsTest | None:
    """F test for adding columns ``z`` to the fitted model, without refitting from scratch.

    The new columns are projected off the model space (z - Q Q'z); the extra SS is the squared
    length of the residual's projection onto what remains. The columns must not depend on the
    response except through the fitted values, which are independent of the residuals under
    normal errors, so F is exact (Tukey's one-degree-of-freedom test included). Returns None
    when the columns add nothing the model does not already span, or leave no residual df.
    """
    q = ctx.ls.q
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
    basis = u[:, keep]

    def f_of(e: np.ndarray) -> np.ndarray:
        extra = np.sum((e @ basis) ** 2, axis=1)
        rest = np.maximum(np.sum(e**2, axis=1) - extra, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(rest > 0, (extra / df1) / (rest / df2), np.inf)

    f = float(f_of(ctx.ls.residuals[None, :])[0])
    null_p = None if ctx.null is None else special.fdtrc(df1, df2, f_of(ctx.null.residuals))
    return AddedColumnsTest(f, df1, df2, float(special.fdtrc(df1, df2, f)), null_p, basis)


def row_medians(a: np.ndarray) -> np.ndarray:
    """Median of each row, as a column (one partition; np.median's generality costs more)."""
    k = a.shape[1]
    m = k // 2
    if k % 2:
        return np.partition(a, m, axis=1)[:, m:m + 1]
    part = np.partition(a, (m - 1, m), axis=1)
    return 0.5 * (part[:, m - 1:m] + part[:, m:m + 1])


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
