"""The residual-check battery: one module per family; ids as in DESIGN.md, "Statistics"."""

from __future__ import annotations

from . import influence, normality, patterns, run_order, variance
from .common import CheckContext, CheckResult

__all__ = ["CheckContext", "CheckResult", "run_checks"]


def run_checks(ctx: CheckContext) -> list[CheckResult]:
    """Every check for the fit, in a fixed order (stable output for hashing)."""
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
    return out
