"""Planning a designed experiment before any run is made: build the design and its randomised
run sheet (:func:`build_plan`), and judge what it can estimate (:func:`evaluate_plan`).

Pure computation like the rest of app/analysis: numpy and scipy (and the analysis's own coding,
terms and alias modules), never flask or sqlalchemy.
"""

from __future__ import annotations

from .build import DESIGNS, build_plan
from .evaluate import evaluate_plan
from .factors import PlanError

__all__ = ["DESIGNS", "PlanError", "build_plan", "evaluate_plan"]
