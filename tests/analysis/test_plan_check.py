"""Runs made against runs planned: matching by label, run order or position; deviations beyond
the tolerance (1 % of the range by default); missing and extra runs. The expected lists are
worked by hand from the small plan below."""

import pandas as pd
import pytest

from app.analysis.plan_check import PlanMismatch, compare, tolerances

PLAN = {
    "factors": [{"name": "Temp", "low": 150.0, "high": 190.0, "units": "°C"},
                {"name": "Time", "low": 10.0, "high": 20.0, "units": "min"}],
    "runs": [{"run_order": 1, "label": "R01", "settings": {"Temp": 190.0, "Time": 10.0}},
             {"run_order": 2, "label": "R02", "settings": {"Temp": 150.0, "Time": 20.0}},
             {"run_order": 3, "label": "R03", "settings": {"Temp": 170.0, "Time": 15.0}}],
}


def _frame(rows):
    frame = pd.DataFrame(rows)
    frame.index = pd.RangeIndex(1, len(frame) + 1, name="row")
    return frame


def test_default_tolerance_is_one_percent_of_the_range():
    assert tolerances(PLAN) == {"Temp": pytest.approx(0.4), "Time": pytest.approx(0.1)}
    assert tolerances(PLAN, {"Temp": 2})["Temp"] == 2.0


def test_an_oven_that_only_reached_188_is_listed_and_small_drift_is_not():
    frame = _frame([{"label": "R01", "Temp": 188.0, "Time": 10.05},
                    {"label": "R02", "Temp": 150.2, "Time": 20.0},
                    {"label": "R09", "Temp": 170.0, "Time": 15.0}])
    got = compare(PLAN, frame, label="label", run_order=None, tolerance=tolerances(PLAN))
    assert got["matched_by"] == "run label" and got["matched_runs"] == 2
    assert [(d["row"], d["factor"], d["planned"], d["run"]) for d in got["deviations"]] == [
        (1, "Temp", 190.0, 188.0)]
    assert got["deviations"][0]["difference"] == pytest.approx(-2.0)
    assert got["missing"] == [{"label": "R03", "run_order": 3}]
    assert got["extra"] == [{"row": 3, "label": "R09"}]


def test_matching_by_run_order_then_position():
    frame = _frame([{"order": 3, "Temp": 170.0, "Time": 15.0},
                    {"order": 1, "Temp": 190.0, "Time": 12.0}])
    got = compare(PLAN, frame, label=None, run_order="order", tolerance=tolerances(PLAN))
    assert got["matched_by"] == "run order"
    assert [(d["run_order"], d["factor"]) for d in got["deviations"]] == [(1, "Time")]
    assert got["missing"] == [{"label": "R02", "run_order": 2}]
    by_position = compare(PLAN, frame, label=None, run_order=None, tolerance=tolerances(PLAN))
    assert by_position["matched_by"].startswith("position")
    assert {d["row"] for d in by_position["deviations"]} == {1, 2}


def test_a_missing_factor_column_or_a_bad_tolerance_is_named():
    with pytest.raises(PlanMismatch, match="'Time'") as missing:
        compare(PLAN, _frame([{"Temp": 1.0}]), label=None, run_order=None,
                tolerance=tolerances(PLAN))
    assert missing.value.field == "Time"
    with pytest.raises(PlanMismatch) as bad:
        tolerances(PLAN, {"Temp": -1})
    assert bad.value.field == "tolerance.Temp"
    with pytest.raises(PlanMismatch) as unknown:
        tolerances(PLAN, {"Pressure": 1})
    assert unknown.value.field == "tolerance.Pressure"
