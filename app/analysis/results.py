"""Frozen result records and their JSON (``to_dict``) and tidy (``to_frame``) views.

``FitResult.to_dict()`` is the document the API serves and the fit snapshot stores (and hashes):
only builtins, NaN and infinities as ``None``, keys in a fixed order, so the same input gives
byte-identical ``json.dumps(..., sort_keys=True)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .checks.common import CheckResult
from .design import DesignInfo
from .runstore import RunColumns, encode, from_table, runs_summary
from .spec import FitSpec


def clean(value: Any) -> Any:
    """Recursively turn numpy scalars/arrays into builtins and NaN/inf into None."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return clean(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    return value


def _finite_list(a: np.ndarray) -> list:
    return [v if math.isfinite(v) else None for v in np.asarray(a, dtype=float).tolist()]


@dataclass(frozen=True)
class CoefficientRow:
    term: str
    estimate: float
    std_error: float
    t_value: float
    p_value: float
    ci_low: float
    ci_high: float
    vif: float

    def to_dict(self) -> dict:
        return clean({"term": self.term, "estimate": self.estimate, "std_error": self.std_error,
                      "t_value": self.t_value, "p_value": self.p_value,
                      "ci": [self.ci_low, self.ci_high], "vif": self.vif})


@dataclass(frozen=True)
class Effect:
    term: str
    effect: float
    coefficient: float

    def to_dict(self) -> dict:
        return clean({"term": self.term, "effect": self.effect, "coefficient": self.coefficient})


@dataclass(frozen=True)
class RunTable:
    """Per-run values, columnar (fast for 100k runs); excluded runs carry predictions only.

    ``observed`` is the response as recorded; ``response_model_scale`` after the transform;
    ``fitted`` and ``residual`` are on the model (transformed) scale.
    """

    row: np.ndarray
    run_order: np.ndarray | None
    label: list | None
    observed: np.ndarray
    response_model_scale: np.ndarray
    fitted: np.ndarray
    residual: np.ndarray
    standardized: np.ndarray
    studentized: np.ndarray
    deleted_studentized: np.ndarray
    leverage: np.ndarray
    cooks_distance: np.ndarray
    dffits: np.ndarray
    excluded: np.ndarray
    exclusion_reason: list
    coded: np.ndarray
    actual: np.ndarray
    factor_names: tuple[str, ...]

    _NUMERIC = ("observed", "response_model_scale", "fitted", "residual", "standardized",
                "studentized", "deleted_studentized", "leverage", "cooks_distance", "dffits")

    def to_records(self, flags: dict[int, list[str]]) -> list[dict]:
        n = len(self.row)
        cols = {name: _finite_list(getattr(self, name)) for name in self._NUMERIC}
        rows = self.row.tolist()
        order = ([int(v) if math.isfinite(v) else None for v in self.run_order.tolist()]
                 if self.run_order is not None else [None] * n)
        labels = self.label if self.label is not None else [None] * n
        excluded = self.excluded.tolist()
        coded = _finite_list(self.coded.ravel())
        actual = _finite_list(self.actual.ravel())
        k = len(self.factor_names)
        out = []
        for i in range(n):
            rec = {"row": rows[i], "run_order": order[i], "label": labels[i],
                   "excluded": excluded[i], "exclusion_reason": self.exclusion_reason[i],
                   "coded": dict(zip(self.factor_names, coded[i * k:(i + 1) * k], strict=True)),
                   "actual": dict(zip(self.factor_names, actual[i * k:(i + 1) * k], strict=True)),
                   "flags": flags.get(rows[i], [])}
            for name in self._NUMERIC:
                rec[name] = cols[name][i]
            out.append(rec)
        return out

    def to_frame(self) -> pd.DataFrame:
        data = {name: getattr(self, name) for name in self._NUMERIC}
        data["run_order"] = self.run_order if self.run_order is not None else [None] * len(self.row)
        data["excluded"] = self.excluded
        for j, name in enumerate(self.factor_names):
            data[f"coded:{name}"] = self.coded[:, j]
        return pd.DataFrame(data, index=pd.Index(self.row, name="row"))


@dataclass(frozen=True)
class FitResult:
    """Everything computed for one fit. ``to_dict()`` is the stored/served document."""

    software_version: str
    spec: FitSpec
    response: str
    design: DesignInfo
    terms: tuple[str, ...]
    coefficients: tuple[CoefficientRow, ...]
    anova: tuple[dict, ...]
    anova_method: str
    fit: dict
    runs: RunTable
    checks: tuple[CheckResult, ...]
    effects: tuple[Effect, ...]
    lenth: dict | None
    half_normal: tuple[dict, ...]
    equation: dict
    transform: dict
    boxcox: dict
    suggestions: tuple[str, ...]
    model: dict
    reduction: tuple[dict, ...] = field(default_factory=tuple)
    # How the check battery was calibrated and adjusted (draws, seed, family, method).
    calibration: dict = field(default_factory=dict)

    def check(self, check_id: str) -> CheckResult:
        """The check with this id (KeyError naming it when absent)."""
        for c in self.checks:
            if c.id == check_id:
                return c
        raise KeyError(f"No check '{check_id}' in this result")

    def run_flags(self) -> dict[int, list[str]]:
        flags: dict[int, list[str]] = {}
        for c in self.checks:
            for row in c.runs:
                flags.setdefault(int(row), []).append(c.id)
        return flags

    def run_columns(self) -> RunColumns:
        """The per-run table as columns (app.analysis.runstore), check flags included."""
        return from_table(self.runs, self.run_flags())

    def stored(self) -> tuple[dict[str, Any], bytes]:
        """The document a fit snapshot stores and the per-run block beside it: the document's
        ``runs`` is the block's summary (counts, format, SHA-256), so hashing the document
        covers the block without serialising every run as JSON."""
        cols = self.run_columns()
        block = encode(cols)
        return self.to_dict(runs=runs_summary(cols, block)), block

    def to_dict(self, runs: Any = None) -> dict[str, Any]:
        """The whole document; ``runs`` replaces the per-run objects when given."""
        return {
            "software_version": self.software_version,
            "spec": clean(self.spec.to_dict()),
            "response": self.response,
            "factors": [f.to_dict() for f in self.spec.factors],
            "design": clean(self.design.to_dict()),
            "terms": list(self.terms),
            "coefficients": [c.to_dict() for c in self.coefficients],
            "anova": clean(list(self.anova)),
            "anova_method": self.anova_method,
            "fit": clean(self.fit),
            "runs": self.runs.to_records(self.run_flags()) if runs is None else runs,
            "checks": [clean(c.to_dict()) for c in self.checks],
            "effects": [e.to_dict() for e in self.effects],
            "lenth": clean(self.lenth),
            "half_normal": clean(list(self.half_normal)),
            "equation": clean(self.equation),
            "transform": clean(self.transform),
            "boxcox": clean(self.boxcox),
            "suggestions": list(self.suggestions),
            "model": clean(self.model),
            "reduction": clean(list(self.reduction)),
            "calibration": clean(self.calibration),
        }

    def to_frame(self, table: str = "coefficients") -> pd.DataFrame:
        """A tidy table: ``coefficients``, ``anova``, ``checks``, ``effects`` or ``runs``."""
        if table == "coefficients":
            return pd.DataFrame([c.to_dict() for c in self.coefficients]).set_index("term")
        if table == "anova":
            return pd.DataFrame(list(self.anova)).set_index("source")
        if table == "checks":
            return pd.DataFrame([{k: v for k, v in c.to_dict().items() if k != "details"}
                                 for c in self.checks]).set_index("id")
        if table == "effects":
            return pd.DataFrame([e.to_dict() for e in self.effects],
                                columns=["term", "effect", "coefficient"])
        if table == "runs":
            return self.runs.to_frame()
        raise ValueError(
            f"Unknown table '{table}': use coefficients, anova, checks, effects or runs")
