"""What a stored fit predicts at chosen settings, and its profiler traces.

Reads only: nothing is stored or audited. Each answer names the fit and its snapshot hash, says
whether the snapshot still verifies, and carries the setpoint caution (a prediction at chosen
settings is how setpoints are judged; the model holds only inside the tested region).
"""

from __future__ import annotations

from typing import Any

from app.analysis.optimize import CAUTION
from app.analysis.profiler import PredictionError, predict_many, profile
from app.store.models import Fit
from app.workflow import WorkflowError, fits


def _about(fit: Fit) -> dict[str, Any]:
    return {"fit": fit.id, "snapshot_sha256": fit.snapshot_sha256,
            "snapshot_intact": fits.snapshot_intact(fit), "caution": CAUTION}


def _level(level: Any) -> float:
    if level is None:
        return 0.95
    if isinstance(level, str):
        try:
            return float(level)
        except ValueError:
            raise WorkflowError(f"level must be a number (got '{level}').",
                                field="level") from None
    return level


def predictions(fit: Fit, settings: Any, level: Any = None) -> dict[str, Any]:
    """Predicted value, CI and PI at each of ``settings`` (natural units)."""
    try:
        answer = predict_many(fits.search_document(fit), settings, level=_level(level))
    except PredictionError as exc:
        raise WorkflowError(str(exc), field=exc.field) from None
    return {**_about(fit), **answer}


def traces(fit: Fit, settings: dict[str, Any] | None, level: Any = None) -> dict[str, Any]:
    """One trace per factor through ``settings`` (the design centre when None)."""
    try:
        answer = profile(fits.search_document(fit), settings, level=_level(level))
    except PredictionError as exc:
        raise WorkflowError(str(exc), field=exc.field) from None
    return {**_about(fit), **answer}
