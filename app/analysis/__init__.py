"""Pure analysis of designed experiments: fit, ANOVA, residual checks, predictions.

Imports numpy, scipy, statsmodels and pandas only, never flask or sqlalchemy
(tests/analysis/test_purity.py enforces it).
"""

from __future__ import annotations

import importlib
from typing import Any

# Loaded on first use (PEP 562), so that a light module of the package (runstore, spec) can be
# imported without the fitting engine and scipy: `plumbline audit verify` reads per-run blocks.
_EXPORTS = {"analyse": ".engine", "predict": ".prediction", "FitResult": ".results",
            "AnalysisError": ".spec", "Factor": ".spec", "FitSpec": ".spec",
            "Thresholds": ".spec", "summary_text": ".summary", "software_version": ".version"}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name not in _EXPORTS:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(_EXPORTS[name], __name__), name)
    globals()[name] = value
    return value
