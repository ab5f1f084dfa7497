"""Pure analysis of designed experiments: fit, ANOVA, residual checks, predictions.

Imports numpy, scipy, statsmodels and pandas only, never flask or sqlalchemy
(tests/analysis/test_purity.py enforces it).
"""

from __future__ import annotations

from .engine import analyse
from .predict import predict
from .results import FitResult
from .spec import AnalysisError, Factor, FitSpec, Thresholds
from .summary import summary_text
from .version import software_version

__all__ = ["AnalysisError", "Factor", "FitResult", "FitSpec", "Thresholds", "analyse",
           "predict", "software_version", "summary_text"]
