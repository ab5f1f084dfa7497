"""One result type for every test statistic the checks use, after scipy's result objects."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class StatisticResult:
    """A test's statistic, its p-value, degrees of freedom and method, and named extras.

    ``pvalue`` is None where the test has none; ``df`` is always a tuple (empty when the
    reference distribution has no degrees of freedom); ``extras`` holds what is particular to
    the test (for example the modified A* of Anderson–Darling, or the runs above and below).
    """

    statistic: float
    pvalue: float | None
    df: tuple[float, ...]
    method: str
    extras: dict[str, Any] = field(default_factory=dict)
