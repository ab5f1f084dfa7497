"""A factor's resolution is what its data states; numbers are shown at it."""

from __future__ import annotations

import pytest

from app.analysis.rounding import decimals, round_to, stated_step


@pytest.mark.parametrize("value, places", [
    (160.0, 0), (143.18, 2), (0.8, 1), (1e-05, 5), (1200.0, 0), (2.5e-3, 4), (-3.25, 2),
])
def test_decimals_of_the_shortest_text(value, places):
    assert decimals(value) == places


def test_the_step_is_the_finest_the_values_are_written_with():
    assert stated_step([143.18, 160.0, 176.82]) == pytest.approx(0.01)
    assert stated_step([0.8, 1.0, 1.2]) == pytest.approx(0.1)
    assert stated_step([25, 30, 35]) == 1.0
    assert stated_step([1e-9, 2e-9]) == pytest.approx(1e-6)  # capped at six decimals
    assert stated_step([float("nan")]) is None


@pytest.mark.parametrize("value, step, text", [
    (166.2345, 0.01, "166.23"), (29.2, 1.0, "29"), (1.1334, 0.1, "1.1"),
    (-0.0001, 0.01, "0.00"), (0.125, 0.25, "0.25"), (None, 1.0, "—"), (3.14159, None, "3.142"),
])
def test_round_to_a_step(value, step, text):
    assert round_to(value, step) == text


def test_rounding_follows_the_units_of_the_data():
    # The same setting in °C with a 0.5-degree step and in mK with a 500 mK step.
    assert float(round_to(166.2, 0.5)) * 1000 == float(round_to(166200.0, 500.0))
