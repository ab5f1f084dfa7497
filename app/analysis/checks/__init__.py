"""The residual-check battery: one module per family; ids as in DESIGN.md, "Statistics"."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..calibration import HOLM, WESTFALL_YOUNG, holm, min_p_adjusted
from . import influence, normality, patterns, run_order, variance
from .common import CheckContext, CheckResult

__all__ = ["CheckContext", "CheckResult", "run_checks", "battery_summary"]


def run_checks(ctx: CheckContext) -> list[CheckResult]:
    """Every check for the fit, in a fixed order (stable output for hashing), judged as one
    family: each verdict follows the check's p-value adjusted across the battery."""
    out = [
        normality.check_normality(ctx),
        run_order.check_autocorrelation(ctx),
        run_order.check_randomness(ctx),
        patterns.check_fitted(ctx),
    ]
    out += [patterns.check_factor(ctx, j) for j in range(len(ctx.factor_names))]
    out += [patterns.check_covariate(ctx, name) for name in ctx.covariates]
    out.append(variance.check_fitted(ctx))
    out += [variance.check_factor(ctx, j) for j in range(len(ctx.factor_names))]
    out += [influence.check_outliers(ctx), influence.check_influence(ctx),
            patterns.check_lack_of_fit(ctx), patterns.check_curvature(ctx)]
    return adjust(out, ctx)


def family_method(checks: list[CheckResult]) -> str:
    family = [c for c in checks if c.p_value is not None]
    if family and all(c.null_p is not None for c in family):
        return WESTFALL_YOUNG
    return HOLM


def adjust(checks: list[CheckResult], ctx: CheckContext) -> list[CheckResult]:
    """Adjust the p-values of the checks that have one, and set verdicts from them."""
    members = [i for i, c in enumerate(checks) if c.p_value is not None]
    if not members:
        return checks
    observed = np.array([checks[i].p_value for i in members])
    if family_method(checks) == WESTFALL_YOUNG:
        null_p = np.column_stack([checks[i].null_p for i in members])
        adjusted = min_p_adjusted(observed, null_p)
    else:
        adjusted = holm(observed)
    out = list(checks)
    for i, p_adj in zip(members, adjusted, strict=True):
        c = checks[i]
        verdict = ctx.thresholds.verdict(float(p_adj))
        message = c.message
        if c.messages is not None:
            message = c.messages[0] if verdict == "pass" else c.messages[1]
        out[i] = replace(c, p_adjusted=float(p_adj), verdict=verdict, message=message)
    return out


def battery_summary(checks: list[CheckResult], ctx: CheckContext) -> dict:
    """How the verdicts were reached: the family, the adjustment and the rate it controls."""
    family = [c.id for c in checks if c.p_value is not None]
    method = family_method(checks)
    t = ctx.thresholds
    return {
        "family": family,
        "adjustment": method,
        "controls": (f"the family-wise rate of false alarms over these {len(family)} checks: on "
                     f"residuals that behave like noise, at most {t.review:g} of fits show any "
                     f"review or fail and at most {t.fail:g} any fail"),
        "draws": None if ctx.null is None else ctx.null.count,
        "seed": None if ctx.null is None else str(ctx.null.seed),
        "p_values": ("simulated for this design where marked, exact F / Imhof elsewhere"
                     if ctx.null is not None else "asymptotic (textbook) distributions"),
    }
