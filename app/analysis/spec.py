"""What to fit: the frozen, JSON-round-trippable fit specification."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, NamedTuple

NAMED_MODELS = ("linear", "interaction", "quadratic", "full")
TRANSFORMS = ("none", "log", "sqrt", "inverse", "boxcox")
COVARIATE_KINDS = ("numeric", "categorical")


class AnalysisError(ValueError):
    """Raised when a fit cannot be made as specified; the message names the field or term."""


@dataclass(frozen=True)
class Factor:
    """A factor column and its declared levels in actual units.

    ``low``/``high`` of ``None`` mean the column already holds coded values (cube points at ±1).
    ``levels`` makes the factor categorical: its level names, in the order they first appear in
    the data (the last one takes -1 in every sum-to-zero column); low and high do not apply.
    """

    name: str
    low: float | None = None
    high: float | None = None
    units: str | None = None
    levels: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise AnalysisError("Every factor needs a non-empty name")
        if self.levels is not None:
            self._check_levels()
        if (self.low is None) != (self.high is None):
            raise AnalysisError(f"Factor '{self.name}': give both low and high, or neither")
        if self.low is not None and not float(self.low) < float(self.high):
            raise AnalysisError(f"Factor '{self.name}': low must be less than high")

    def _check_levels(self) -> None:
        levels = self.levels
        if not isinstance(levels, tuple) or not all(isinstance(v, str) for v in levels):
            raise AnalysisError(f"Factor '{self.name}': levels must be a tuple of names")
        if len(set(levels)) != len(levels):
            raise AnalysisError(f"Factor '{self.name}': level names must be distinct")
        if len(levels) < 2:
            raise AnalysisError(f"Factor '{self.name}': a categorical factor needs at least two "
                                "levels")
        if self.low is not None or self.high is not None:
            raise AnalysisError(f"Factor '{self.name}': a categorical factor has levels, not "
                                "low and high")

    @property
    def coded(self) -> bool:
        return self.low is None and self.levels is None

    @property
    def categorical(self) -> bool:
        return self.levels is not None

    def to_dict(self) -> dict[str, Any]:
        out = {"name": self.name, "low": self.low, "high": self.high, "units": self.units}
        # only categorical factors carry the key, so stored specs of continuous ones (and the
        # seeds derived from them) are unchanged
        if self.levels is not None:
            out["levels"] = list(self.levels)
        return out

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Factor:
        low, high = d.get("low"), d.get("high")
        levels = d.get("levels")
        return cls(
            name=d["name"],
            low=None if low is None else float(low),
            high=None if high is None else float(high),
            units=d.get("units"),
            levels=None if levels is None else tuple(str(v) for v in levels),
        )


NO_P_VALUE_REASON = ("not applicable: the test gives no p-value for these data (it is missing "
                     "or not a finite number)")


class Judgement(NamedTuple):
    """A verdict and, for ``not_applicable``, the reason to show in place of a message."""

    verdict: str
    reason: str | None = None


@dataclass(frozen=True)
class Thresholds:
    """p-value thresholds: below ``fail`` a check fails, below ``review`` it needs review."""

    review: float = 0.05
    fail: float = 0.01

    def __post_init__(self) -> None:
        if not 0.0 < self.fail <= self.review < 1.0:
            raise AnalysisError(
                f"Thresholds need 0 < fail <= review < 1 "
                f"(got review={self.review}, fail={self.fail})"
            )

    def verdict(self, p_value: float | None) -> str:
        """Map a p-value to pass/review/fail; fails closed: a p-value that is missing or not a
        finite number in [0, 1] gives ``not_applicable``, never pass (see :meth:`judge`)."""
        return self.judge(p_value).verdict

    def judge(self, p_value: float | None) -> Judgement:
        """The verdict with the reason when there is none to give (for the check's message)."""
        # a p-value a rounding step above 1 is still a p-value; anything else is not
        if p_value is None or not math.isfinite(p_value) or not 0.0 <= p_value <= 1.0 + 1e-9:
            return Judgement("not_applicable", NO_P_VALUE_REASON)
        if p_value < self.fail:
            return Judgement("fail")
        if p_value < self.review:
            return Judgement("review")
        return Judgement("pass")

    def to_dict(self) -> dict[str, float]:
        return {"review": self.review, "fail": self.fail}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Thresholds:
        return cls(review=float(d.get("review", 0.05)), fail=float(d.get("fail", 0.01)))


@dataclass(frozen=True)
class FitSpec:
    """Everything needed to repeat a fit: response, factors, model terms, transform, exclusions."""

    response: str
    factors: tuple[Factor, ...]
    run_order: str | None = None
    block: str | None = None
    covariates: tuple[tuple[str, str], ...] = ()
    label: str | None = None
    model: str | None = "linear"
    terms: tuple[str, ...] | None = None
    hierarchy: bool = True
    transform: str = "none"
    boxcox_lambda: float | None = None
    exclusions: tuple[tuple[int, str], ...] = ()
    reduce_alpha: float | None = None
    thresholds: Thresholds = field(default_factory=Thresholds)

    def __post_init__(self) -> None:
        if not self.factors:
            raise AnalysisError("At least one factor is needed")
        names = [f.name for f in self.factors]
        if len(set(names)) != len(names):
            raise AnalysisError(f"Factor names must be distinct: {names}")
        if self.response in names:
            raise AnalysisError(f"Column '{self.response}' cannot be both response and factor")
        if self.terms is None and self.model not in NAMED_MODELS:
            raise AnalysisError(f"model must be one of {', '.join(NAMED_MODELS)}, or give terms")
        if self.terms is not None and not self.terms:
            raise AnalysisError("terms, when given, must name at least one term")
        if self.transform not in TRANSFORMS:
            raise AnalysisError(f"transform must be one of {', '.join(TRANSFORMS)}")
        for name, kind in self.covariates:
            if kind not in COVARIATE_KINDS:
                raise AnalysisError(f"Covariate '{name}': kind must be numeric or categorical")
        for row, reason in self.exclusions:
            if not isinstance(reason, str) or not reason.strip():
                raise AnalysisError(f"Exclusion of row {row} needs a written reason")
        rows = [row for row, _ in self.exclusions]
        if len(set(rows)) != len(rows):
            raise AnalysisError("Each excluded row may appear only once")
        if self.reduce_alpha is not None and not 0.0 < self.reduce_alpha < 1.0:
            raise AnalysisError("reduce_alpha must lie between 0 and 1")

    def to_dict(self) -> dict[str, Any]:
        return {
            "response": self.response,
            "factors": [f.to_dict() for f in self.factors],
            "run_order": self.run_order,
            "block": self.block,
            "covariates": [[n, k] for n, k in self.covariates],
            "label": self.label,
            "model": self.model,
            "terms": None if self.terms is None else list(self.terms),
            "hierarchy": self.hierarchy,
            "transform": self.transform,
            "boxcox_lambda": self.boxcox_lambda,
            "exclusions": [[int(r), s] for r, s in self.exclusions],
            "reduce_alpha": self.reduce_alpha,
            "thresholds": self.thresholds.to_dict(),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FitSpec:
        terms = d.get("terms")
        return cls(
            response=d["response"],
            factors=tuple(Factor.from_dict(f) for f in d["factors"]),
            run_order=d.get("run_order"),
            block=d.get("block"),
            covariates=tuple((str(n), str(k)) for n, k in d.get("covariates", ())),
            label=d.get("label"),
            model=d.get("model", "linear"),
            terms=None if terms is None else tuple(terms),
            hierarchy=bool(d.get("hierarchy", True)),
            transform=d.get("transform", "none"),
            boxcox_lambda=d.get("boxcox_lambda"),
            exclusions=tuple((int(r), str(s)) for r, s in d.get("exclusions", ())),
            reduce_alpha=d.get("reduce_alpha"),
            thresholds=Thresholds.from_dict(d.get("thresholds", {})),
        )
