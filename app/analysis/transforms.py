"""Response transformations and their inverses (for back-transformed predictions)."""

from __future__ import annotations

import numpy as np

from .spec import AnalysisError


def transform_label(transform: str, lam: float | None) -> str:
    if transform == "boxcox":
        return f"Box-Cox (lambda = {lam:g})"
    return {"none": "none", "log": "natural log", "sqrt": "square root",
            "inverse": "reciprocal (1/y)"}[transform]


def check_domain(y: np.ndarray, transform: str, rows: np.ndarray, response: str) -> None:
    """Raise naming the first row whose response the transform cannot take."""
    if transform in ("log", "inverse", "boxcox"):
        bad = ~(y > 0)
        need = "positive"
    elif transform == "sqrt":
        bad = ~(y >= 0)
        need = "zero or positive"
    else:
        return
    if bad.any():
        row = rows[int(np.argmax(bad))]
        raise AnalysisError(
            f"Transform '{transform}' needs {need} values of '{response}': "
            f"row {row} has {y[bad][0]:g}"
        )


def forward(y: np.ndarray, transform: str, lam: float | None = None) -> np.ndarray:
    """Apply the transform; Box–Cox is (y^lambda - 1)/lambda, log y at lambda = 0."""
    y = np.asarray(y, dtype=float)
    if transform == "none":
        return y.copy()
    if transform == "log":
        return np.log(y)
    if transform == "sqrt":
        return np.sqrt(y)
    if transform == "inverse":
        return 1.0 / y
    if transform == "boxcox":
        if lam is None:
            raise AnalysisError("Box-Cox transform needs a lambda")
        return np.log(y) if abs(lam) < 1e-12 else (y**lam - 1.0) / lam
    raise AnalysisError(f"Unknown transform '{transform}'")


def inverse(z: np.ndarray | float, transform: str, lam: float | None = None) -> np.ndarray:
    """Back-transform to the response scale; NaN where the value has no pre-image."""
    z = np.asarray(z, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if transform == "none":
            return z.copy()
        if transform == "log":
            return np.exp(z)
        if transform == "sqrt":
            return np.where(z >= 0, z**2, np.nan)
        if transform == "inverse":
            return np.where(z > 0, 1.0 / z, np.nan)
        if transform == "boxcox":
            if abs(lam) < 1e-12:
                return np.exp(z)
            base = lam * z + 1.0
            return np.where(base > 0, np.abs(base) ** (1.0 / lam), np.nan)
    raise AnalysisError(f"Unknown transform '{transform}'")


def is_decreasing(transform: str, lam: float | None) -> bool:
    """True when the transform reverses order, so back-transformed interval ends swap.

    Box–Cox (y^lambda - 1)/lambda increases for every lambda; only 1/y reverses order.
    """
    del lam
    return transform == "inverse"
