"""Numbers as precise as the data states, not as precise as a double.

A factor's resolution is the smallest step its values are written with in the uploaded data:
``10**-d`` where ``d`` is the largest number of decimals among its values (each taken in its
shortest text form, so 160.0 has none and 143.18 has two), capped at :data:`MAX_DECIMALS`.
Setpoints and tolerances are shown and exported at that resolution, with their units.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from decimal import Decimal

MAX_DECIMALS = 6


def decimals(value: float) -> int:
    """Decimals in the shortest text that reads back as ``value`` (0 for whole numbers)."""
    if not math.isfinite(value):
        return 0
    exponent = Decimal(repr(float(value))).normalize().as_tuple().exponent
    return max(0, -int(exponent))


def stated_step(values: Iterable[float]) -> float | None:
    """The resolution the values are written with; None when there are no finite values."""
    seen = [decimals(v) for v in values if v is not None and math.isfinite(v)]
    if not seen:
        return None
    return 10.0 ** -min(max(seen), MAX_DECIMALS)


def step_decimals(step: float | None) -> int:
    if step is None or step <= 0 or not math.isfinite(step):
        return 4
    return min(MAX_DECIMALS, decimals(step))


def round_to(value: float | None, step: float | None) -> str:
    """``value`` rounded to ``step`` (as text with that many decimals); '—' for none. Without
    a step, four significant digits."""
    if value is None or not math.isfinite(value):
        return "—"
    if step is None:
        return f"{value:.4g}"
    places = step_decimals(step)
    # Half away from zero, as people round by hand.
    rounded = math.copysign(math.floor(abs(value) / step + 0.5), value) * step
    text = f"{rounded:.{places}f}"
    return text.lstrip("-") if float(text) == 0 else text  # never "-0.0"


def setting_text(value: float | str | None, step: float | None) -> str:
    """A setting as text: a categorical factor's level name as it is, a number rounded to
    ``step`` (:func:`round_to`)."""
    return value if isinstance(value, str) else round_to(value, step)
