"""Charts of fits with many runs: bins that hold every run once, the flagged runs on top as
points, valid Vega-Lite, and a note that says so."""

from __future__ import annotations

import jsonschema
import numpy as np
import pandas as pd
import pytest
from altair.vegalite.v6.schema.core import load_schema

from app.analysis import Factor, FitSpec, analyse, runstore
from app.web import charts, charts_binned

N = 8000


@pytest.fixture(scope="module")
def big():
    """A 3-factor, 5-level design in 8,000 runs with a few gross errors planted in it."""
    rng = np.random.default_rng(7)
    x = rng.integers(-2, 3, size=(N, 3)).astype(float)
    y = 50 + x @ [2.0, -1.0, 0.5] + 0.4 * x[:, 0] ** 2 + rng.normal(size=N)
    y[[10, 2000, 7000]] += 12.0
    frame = pd.DataFrame({"A": x[:, 0], "B": x[:, 1], "C": x[:, 2], "Y": y,
                          "order": rng.permutation(N) + 1}, index=pd.RangeIndex(1, N + 1))
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B"), Factor("C")),
                   run_order="order", model="quadratic")
    doc, block = analyse(frame, spec).stored()
    cols = runstore.decode(block)
    return doc, cols, charts.all_charts(doc, cols=cols)


def test_beyond_the_limit_every_run_chart_is_binned_valid_and_small(big):
    doc, cols, built = big
    validator = jsonschema.Draft7Validator(load_schema())
    names = {c.name for c in built}
    for check in doc["checks"]:
        assert check["chart"] in names, check["id"]
    flagged = set(cols.flags)
    for chart in built:
        errors = sorted(validator.iter_errors(chart.spec), key=str)
        assert not errors, f"{chart.name}: {errors[0].message}"
        points = chart.spec["datasets"].get("runs", [])
        if "bins" in chart.spec["datasets"]:
            assert len(points) <= charts_binned.MARK_MAX, chart.name
            assert {p["row"] for p in points} <= flagged, chart.name
            assert len(chart.rows) <= charts_binned.TABLE_ROWS, chart.name
            assert "bins" in chart.note or "levels" in chart.note, chart.name
        assert len(str(chart.spec)) < 400_000, chart.name


def test_bins_hold_every_run_once(big):
    _, cols, built = big
    used = int(cols.included.sum())
    by_name = {c.name: c for c in built}
    for name in ("normal_probability", "residuals_vs_fitted", "leverage",
                 "residuals_vs_factor:A"):
        cells = by_name[name].spec["datasets"]["bins"]
        assert sum(c["runs"] for c in cells) == used, name
    assert sum(b["runs"] for b in by_name["histogram"].spec["datasets"]["bins"]) == used
    assert sum(b["runs"] for b in by_name["run_order"].spec["datasets"]["bins"]) == used
    assert sum(b["n"] for b in by_name["spread_by_level:B"].spec["datasets"]["bins"]) == used


def test_planted_errors_are_drawn_as_points_everywhere(big):
    _, _, built = big
    by_name = {c.name: c for c in built}
    for name in ("residuals_vs_fitted", "run_order", "normal_probability", "leverage"):
        rows = {p["row"] for p in by_name[name].spec["datasets"]["runs"]}
        assert {11, 2001, 7001} <= rows, name


def test_run_order_band_spans_each_bins_lowest_to_highest(big):
    _, cols, built = big
    band = next(c for c in built if c.name == "run_order").spec["datasets"]["bins"]
    stud = cols.values["studentized"][cols.included]
    assert min(b["min"] for b in band) == pytest.approx(stud.min())
    assert max(b["max"] for b in band) == pytest.approx(stud.max())
    assert all(b["min"] <= b["q1"] <= b["median"] <= b["q3"] <= b["max"] for b in band)


def test_spread_by_level_matches_numpy_per_level(big):
    _, cols, built = big
    chart = next(c for c in built if c.name == "spread_by_level:A")
    inc = cols.included
    res, level = cols.values["residual"][inc], cols.actual["A"][inc]
    for b in chart.spec["datasets"]["bins"]:
        assert b["sd"] == pytest.approx(np.std(res[level == b["level"]], ddof=1), rel=1e-9)


def test_small_designs_keep_one_point_per_run(big):
    doc, cols, _ = big
    few = np.arange(40)
    small = charts_binned._subset(cols, few)
    built = charts.all_charts(doc, cols=small)
    fitted = next(c for c in built if c.name == "residuals_vs_fitted")
    assert "bins" not in fitted.spec["datasets"]
    assert len(fitted.spec["datasets"]["runs"]) == int(small.included.sum())


def test_binned_charts_draw_left_out_runs_on_top():
    rng = np.random.default_rng(11)
    x = rng.integers(-1, 2, size=(N, 2)).astype(float)
    y = 5 + x @ [1.0, 2.0] + rng.normal(size=N)
    frame = pd.DataFrame({"A": x[:, 0], "B": x[:, 1], "Y": y}, index=pd.RangeIndex(1, N + 1))
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B")), model="interaction",
                   exclusions=((5, "sensor fault"), (6000, "sample lost")))
    doc, block = analyse(frame, spec).stored()
    cols = runstore.decode(block)
    validator = jsonschema.Draft7Validator(load_schema())
    for chart in charts.all_charts(doc, cols=cols):
        if "bins" not in chart.spec["datasets"] and chart.name != "contour":
            continue
        assert not list(validator.iter_errors(chart.spec)), chart.name
        left = chart.spec["datasets"]["left_out"]
        assert [(r["row"], r["reason"]) for r in left] == [(5, "sensor fault"),
                                                           (6000, "sample lost")], chart.name
        assert [r[2] for r in chart.left_out] == [5, 6000]
