"""Chart specs built from real results documents: valid Vega-Lite, one data row per run."""

from __future__ import annotations

import jsonschema
import numpy as np
import pytest
from altair.vegalite.v6.schema.core import load_schema
from numpy.testing import assert_allclose
from scipy import stats

from app.analysis import Factor, FitSpec, Thresholds, analyse, predict
from app.demo_data import rsm_study, screening_study
from app.ingest import read_upload, validate
from app.web import charts

RUN_CHARTS = ("normal_probability", "histogram", "residuals_vs_fitted", "run_order",
              "residuals_vs_factor:", "spread_by_level:", "cooks_distance", "leverage",
              "residuals_vs_covariate:")


def _document(demo, **choices) -> tuple[dict, dict]:
    raw = read_upload(demo.csv_bytes, demo.filename)
    table = validate(raw, demo.roles)
    factors = tuple(Factor(n, r.low, r.high, r.units) for n, r in demo.roles.items()
                    if r.role == "factor")
    covariates = tuple((n, r.kind) for n, r in demo.roles.items() if r.role == "covariate")
    spec = FitSpec(factors=factors, run_order="Run order", label="Panel ID",
                   covariates=covariates, thresholds=Thresholds(), **choices)
    values = {n: {int(k): float(v) for k, v in table.frame[n].items()} for n, _ in covariates}
    return analyse(table.frame, spec).to_dict(), values


@pytest.fixture(scope="module")
def rsm():
    return _document(rsm_study(), response="Hardness", model="quadratic",
                     exclusions=((3, "panel scratched"),))


@pytest.fixture(scope="module")
def screening():
    return _document(screening_study(), response="Film thickness", model="linear")


@pytest.fixture(scope="module")
def saturated():
    return _document(screening_study(), response="Film thickness", model="interaction")


@pytest.fixture(scope="module")
def validator():
    return jsonschema.Draft7Validator(load_schema())


def _rows(spec: dict) -> list[dict]:
    return spec["datasets"]["runs"]


def _is_run_chart(name: str) -> bool:
    return any(name == p or (p.endswith(":") and name.startswith(p)) for p in RUN_CHARTS)


@pytest.mark.parametrize("which", ["rsm", "screening", "saturated"])
def test_every_chart_is_valid_vega_lite_with_one_row_per_run(request, validator, which):
    results, covariates = request.getfixturevalue(which)
    built = charts.all_charts(results, covariates=covariates)
    assert built, "no charts were built"
    used = sorted(r["row"] for r in results["runs"] if not r["excluded"]
                  and r["standardized"] is not None)
    for chart in built:
        errors = sorted(validator.iter_errors(chart.spec), key=str)
        assert not errors, f"{chart.name}: {errors[0].message}"
        assert chart.spec["$schema"].endswith("v6.4.1.json")
        if _is_run_chart(chart.name):
            rows = _rows(chart.spec)
            assert sorted(r["row"] for r in rows) == used, chart.name
            assert all(r["label"] and r["run_order"] for r in rows), chart.name
            # The text alternative holds the same runs as the chart.
            assert len(chart.rows) == len(used), chart.name
            params = {p["name"] for layer in chart.spec["layer"] for p in layer.get("params", [])}
            params |= {p["name"] for p in chart.spec.get("params", [])}
            assert {"pick", "highlight_row"} <= params, chart.name


def test_chart_names_match_the_checks(rsm, screening):
    for results, covariates in (rsm, screening):
        names = {c.name for c in charts.all_charts(results, covariates=covariates)}
        for check in results["checks"]:
            assert check["chart"] in names, check["id"]


def test_excluded_run_is_left_out_of_residual_charts_but_shown_on_the_contour(rsm):
    results, _ = rsm
    by_name = {c.name: c for c in charts.all_charts(results)}
    assert 3 not in {r["row"] for r in _rows(by_name["residuals_vs_fitted"].spec)}
    # The contour overlays the design points that entered the fit.
    assert 3 not in {r["row"] for r in _rows(by_name["contour"].spec)}
    assert len(_rows(by_name["contour"].spec)) == 19


def test_run_order_chart_has_control_limits_and_joins_runs_in_order(rsm):
    results, _ = rsm
    chart = charts.run_order(results)
    limits = sorted(v["at"] for layer in chart.spec["layer"] if "data" in layer
                    for v in layer["data"]["values"])
    # the outlier check's limit, on the residual kind that check judges
    assert limits == [-2.5, 0, 2.5]
    line = next(layer for layer in chart.spec["layer"] if layer.get("name") == "path")
    assert line["mark"]["type"] == "line"
    assert line["encoding"]["order"]["field"] == "run_order"
    studentized = {r["row"]: r["studentized"] for r in results["runs"] if not r["excluded"]}
    for row in _rows(chart.spec):
        assert row["studentized"] == studentized[row["row"]]


def test_normal_plot_uses_blom_scores_and_a_quartile_line(rsm):
    results, _ = rsm
    chart = charts.normal_probability(results)
    rows = sorted(_rows(chart.spec), key=lambda r: r["residual"])
    n = len(rows)
    # Blom plotting positions (i - 3/8) / (n + 1/4), cross-checked with scipy's probplot.
    (osm, osr), _ = stats.probplot([r["residual"] for r in rows], dist="norm")
    assert_allclose([r["normal_score"] for r in rows],
                    stats.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25)), rtol=1e-12)
    assert_allclose(sorted(r["residual"] for r in rows), osr, rtol=1e-12)
    line = chart.spec["layer"][0]["data"]["values"]
    res = np.array([r["residual"] for r in rows])
    q1, q3 = np.percentile(res, [25, 75])
    slope = (line[1]["ref"] - line[0]["ref"]) / (line[1]["z"] - line[0]["z"])
    assert_allclose(slope, (q3 - q1) / (stats.norm.ppf(0.75) - stats.norm.ppf(0.25)),
                    rtol=1e-12)


def _vertical_lines(chart) -> list[dict]:
    return [layer for layer in chart.spec["layer"]
            if layer.get("encoding", {}).get("x", {}).get("field") == "at"]


def test_leverage_line_is_two_p_over_n(screening):
    results, _ = screening
    chart = charts.leverage(results)
    p, n = results["fit"]["p"], results["fit"]["n"]
    assert 2 * p / n < 1
    vertical = _vertical_lines(chart)
    assert_allclose(vertical[0]["data"]["values"][0]["at"], 2 * p / n, rtol=1e-12)
    assert chart.note.startswith(f"Vertical line at 2p/n = {2 * p / n:.3g}")


def test_leverage_line_is_left_out_when_two_p_over_n_reaches_one(rsm):
    """10 terms in 19 runs: 2p/n = 1.05, beyond any run's leverage (at most 1)."""
    results, _ = rsm
    assert (results["fit"]["p"], results["fit"]["n"]) == (10, 19)
    chart = charts.leverage(results)
    assert _vertical_lines(chart) == []
    assert chart.note.startswith("No 2p/n line: 2p/n = 1.05 is at or above 1")


def test_half_normal_has_lenth_lines_for_two_level_design(saturated, rsm):
    results, _ = saturated
    chart = charts.half_normal(results)
    lines = sorted(v["at"] for layer in chart.spec["layer"] if "data" in layer
                   for v in layer["data"]["values"])
    assert_allclose(lines, sorted([results["lenth"]["me"], results["lenth"]["sme"]]),
                    rtol=1e-12)
    assert len(_rows(chart.spec)) == 15
    # Not a two-level design: no half-normal plot.
    assert charts.half_normal(rsm[0]) is None


def test_boxcox_profile_cut_off_is_the_chi_square_half_quantile(rsm):
    results, _ = rsm
    chart = charts.boxcox_profile(results)
    top = max(p["log_likelihood"] for p in results["boxcox"]["profile"])
    cut = chart.spec["layer"][1]["data"]["values"][0]["at"]
    # 95 % profile-likelihood interval: drop of chi2(0.95, 1) / 2 = 1.92 from the maximum.
    assert_allclose(top - cut, 1.920729, rtol=1e-6)


def test_predict_grid_agrees_with_predict(rsm):
    results, _ = rsm
    settings = [{"Cure temperature": 152.0, "Cure time": 21.0, "Catalyst": 0.9},
                {"Cure temperature": 168.5, "Cure time": 29.0, "Catalyst": 1.1},
                {"Cure temperature": 160.0, "Cure time": 25.0, "Catalyst": 1.0}]
    grid = charts.predict_grid(results["model"], {k: np.array([s[k] for s in settings])
                                                  for k in settings[0]})
    expected = [predict(results, s)["predicted"] for s in settings]
    assert_allclose(grid, expected, rtol=1e-12)


def test_predict_grid_back_transforms_like_predict():
    results, _ = _document(rsm_study(), response="Hardness", model="quadratic",
                           transform="log")
    setting = {"Cure temperature": 155.0, "Cure time": 27.0, "Catalyst": 0.95}
    grid = charts.predict_grid(results["model"], {k: np.array([v]) for k, v in setting.items()})
    assert_allclose(grid[0], predict(results, setting)["predicted"], rtol=1e-12)


def test_contour_surface_covers_the_design_and_others_sit_at_centre(rsm):
    results, _ = rsm
    chart = charts.contour(results, "Cure time", "Catalyst")
    cells = chart.spec["datasets"]["surface"]
    assert len(cells) == charts.GRID ** 2
    centre_x = [c for c in cells if abs((c["x"] + c["x2"]) / 2 - 25.0) < 1e-9]
    assert centre_x, "the grid should pass through the centre of Cure time"
    cell = min(centre_x, key=lambda c: abs((c["y"] + c["y2"]) / 2 - 1.0))
    expected = predict(results, {"Cure temperature": 160.0, "Cure time": 25.0,
                                 "Catalyst": (cell["y"] + cell["y2"]) / 2})["predicted"]
    assert_allclose(cell["predicted"], expected, atol=1e-4)
    assert "Cure temperature" in chart.note


def test_no_run_order_means_no_run_order_chart(rsm):
    results, _ = rsm
    stripped = {**results, "runs": [{**r, "run_order": None} for r in results["runs"]]}
    assert charts.run_order(stripped) is None


def test_leverage_chart_draws_the_outlier_limit_on_the_studentized_scale(rsm):
    results, _ = rsm
    chart = charts.leverage(results)
    assert chart.spec["layer"][-1]["encoding"]["y"]["field"] == "studentized"
    limit = next(c for c in results["checks"] if c["id"] == "outliers")["details"]["limit"]
    ats = sorted(v["at"] for layer in chart.spec["layer"] if "data" in layer
                 for v in layer["data"]["values"])
    assert -limit in ats and limit in ats


@pytest.fixture(scope="module")
def categorical():
    """Two continuous factors and a categorical one with three levels (file order M2, M1, M3)."""
    import pandas as pd

    rng = np.random.default_rng(3)
    machine = ["M2", "M1", "M3"] * 8
    a = np.tile([-1.0, 1.0, -1.0, 1.0, 0.0, 0.0, 1.0, -1.0], 3)
    b = np.repeat([-1.0, 1.0, 0.0], 8)
    shift = np.array([{"M2": 1.0, "M1": -0.5, "M3": -0.5}[m] for m in machine])
    y = 10 + 2 * a - b + shift + rng.normal(scale=0.3, size=24)
    frame = pd.DataFrame({"Machine": np.array(machine, dtype=object), "A": a, "B": b, "y": y},
                         index=pd.RangeIndex(1, 25, name="row"))
    spec = FitSpec(response="y", factors=(Factor("Machine", levels=("M2", "M1", "M3")),
                                          Factor("A"), Factor("B")), model="interaction")
    return analyse(frame, spec).to_dict()


def test_categorical_factor_charts_use_level_names_on_a_nominal_axis(categorical, validator):
    built = {c.name: c for c in charts.all_charts(categorical)}
    for chart in built.values():
        errors = sorted(validator.iter_errors(chart.spec), key=str)
        assert not errors, f"{chart.name}: {errors[0].message}"
    factor_chart = built["residuals_vs_factor:Machine"]
    x = next(layer["encoding"]["x"] for layer in factor_chart.spec["layer"]
             if "x" in layer.get("encoding", {}) and layer["encoding"]["x"].get("field") == "level")
    assert x["type"] == "nominal" and x["sort"] == ["M2", "M1", "M3"]
    assert {r["level"] for r in _rows(factor_chart.spec)} == {"M2", "M1", "M3"}
    assert [row[2] for row in built["spread_by_level:Machine"].rows][:1] == ["M2"]
    # the surface is over the two continuous factors
    assert built["contour"].title == "Fitted y over A and B"


def test_predict_grid_averages_a_categorical_factor_over_its_levels(categorical):
    model = categorical["model"]
    grid = charts.predict_grid(model, {"Machine": 0.0, "A": np.array([0.5]),
                                       "B": np.array([-0.25])})
    each = [predict(categorical, {"Machine": m, "A": 0.5, "B": -0.25})["predicted"]
            for m in ("M2", "M1", "M3")]
    assert_allclose(grid[0], np.mean(each), rtol=1e-12)
    one = charts.predict_grid(model, {"Machine": "M1", "A": np.array([0.5]),
                                      "B": np.array([-0.25])})
    assert_allclose(one[0], each[1], rtol=1e-12)


def _left_out_layer(spec: dict) -> dict:
    return next(layer for layer in spec["layer"] if layer.get("name") == "left_out")


def test_left_out_run_is_drawn_hollow_and_grey_on_every_run_chart(rsm, validator):
    results, covariates = rsm
    built = {c.name: c for c in charts.all_charts(results, covariates=covariates)}
    drawn = [c for c in built.values() if _is_run_chart(c.name) or c.name == "contour"]
    assert len(drawn) >= 10
    for chart in drawn:
        assert not list(validator.iter_errors(chart.spec)), chart.name
        # not part of the statistics: the fitted runs' dataset does not hold it
        assert 3 not in {r["row"] for r in _rows(chart.spec)}, chart.name
        left = chart.spec["datasets"]["left_out"]
        assert [(r["row"], r["label"], r["reason"]) for r in left] == [
            (3, "CV40-R03", "panel scratched")], chart.name
        layer = _left_out_layer(chart.spec)
        colour = layer["encoding"]["color"]
        assert colour["value"] == "#8a8f98", chart.name
        # a click on it highlights the run everywhere, as on a fitted run
        assert colour["condition"] == {"test": "datum.row === highlight_row",
                                       "value": charts.HIGHLIGHT}
        assert [p["name"] for p in layer["params"]] == ["pick_left_out"]
        assert layer["mark"].get("filled") is False or layer["mark"]["type"] == "tick"
        assert "reason" in {t["field"] for t in layer["encoding"]["tooltip"]}
        for axis in ("x", "y"):
            field = layer["encoding"][axis].get("field")
            if field:
                assert left[0][field] is not None, (chart.name, axis)
        assert chart.left_out == [("CV40-R03", 3, 3, "panel scratched")], chart.name
        assert "left out" in chart.note
    # the settings it was run at, on the factor and contour charts
    assert built["residuals_vs_factor:Catalyst"].spec["datasets"]["left_out"][0]["level"] == 0.8
    contour_left = built["contour"].spec["datasets"]["left_out"][0]
    assert (contour_left["px"], contour_left["py"]) == (150.0, 30.0)


def test_left_out_run_scores_agree_with_statsmodels_prediction(rsm):
    """Residual = observed − prediction; studentized = residual / se_obs and leverage =
    (se_mean / s)² from statsmodels OLS.get_prediction on the fitted runs alone."""
    import pandas as pd
    import statsmodels.api as sm

    results, _ = rsm
    runs = pd.DataFrame([{**r["coded"], "y": r["observed"], "row": r["row"],
                          "excluded": r["excluded"]} for r in results["runs"]])
    names = ["Cure temperature", "Cure time", "Catalyst"]
    x = pd.DataFrame({"const": 1.0, **{n: runs[n] for n in names}})
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            x[f"{a}:{b}"] = runs[a] * runs[b]
    for n in names:
        x[f"{n}^2"] = runs[n] ** 2
    keep = ~runs["excluded"]
    ols = sm.OLS(runs["y"][keep], x[keep]).fit()
    pred = ols.get_prediction(x[~keep])
    residual = float(runs["y"][~keep].iloc[0] - pred.predicted_mean[0])
    s = float(np.sqrt(ols.scale))
    chart = {c.name: c for c in charts.all_charts(results)}
    on_leverage = chart["leverage"].spec["datasets"]["left_out"][0]
    on_fitted = chart["residuals_vs_fitted"].spec["datasets"]["left_out"][0]
    assert_allclose(on_fitted["residual"], residual, rtol=1e-9)
    assert_allclose(on_leverage["studentized"], residual / pred.se_obs[0], rtol=1e-9)
    assert_allclose(on_leverage["leverage"], (pred.se_mean[0] / s) ** 2, rtol=1e-9)


def test_charts_without_left_out_runs_draw_no_extra_layer(screening):
    results, covariates = screening
    for chart in charts.all_charts(results, covariates=covariates):
        assert "left_out" not in chart.spec.get("datasets", {}), chart.name
        assert chart.left_out == []


def _demo_frame(demo):
    import io

    import pandas as pd

    return pd.read_csv(io.BytesIO(demo.csv_bytes))


def test_main_effects_of_a_two_level_design_are_observed_means(screening, validator):
    """Checked against pandas groupby on the uploaded file itself."""
    results, _ = screening
    chart = {c.name: c for c in charts.all_charts(results)}["main_effects"]
    assert not list(validator.iter_errors(chart.spec))
    frame = _demo_frame(screening_study())
    for i, name in enumerate(f["name"] for f in results["factors"]):
        expected = frame.groupby(name)["Film thickness"].agg(["mean", "count"])
        plotted = chart.spec["datasets"][f"main_{i}"]
        assert [d["level"] for d in plotted] == expected.index.tolist(), name
        assert_allclose([d["mean"] for d in plotted], expected["mean"], rtol=1e-12)
        assert [d["runs"] for d in plotted] == expected["count"].tolist()
        assert chart.spec["concat"][i]["title"] == f"{name} (observed mean)"


def test_interaction_plot_lines_are_cell_means_at_low_and_high(saturated):
    results, _ = saturated
    chart = {c.name: c for c in charts.all_charts(results)}["interactions"]
    frame = _demo_frame(screening_study())
    pairs = [t["name"].split(":") for t in results["model"]["terms"] if ":" in t["name"]]
    assert len(chart.spec["concat"]) == len(pairs) == 10
    x, trace = pairs[0]
    plotted = chart.spec["datasets"]["pair_0"]
    for held_at, word in ((frame[trace].min(), "low"), (frame[trace].max(), "high")):
        cells = frame[frame[trace] == held_at].groupby(x)["Film thickness"].mean()
        line = [d for d in plotted if d["held"] == f"{trace} {word} ({held_at:g})"]
        assert [d["level"] for d in line] == cells.index.tolist()
        assert_allclose([d["mean"] for d in line], cells.to_numpy(), rtol=1e-12)


def test_main_effects_of_a_composite_design_are_predictions_and_say_so(rsm):
    results, _ = rsm
    built = {c.name: c for c in charts.all_charts(results)}
    chart = built["main_effects"]
    assert "Cure temperature: model prediction" in chart.note
    trace = chart.spec["datasets"]["main_0"]
    end = predict(results, {"Cure temperature": trace[-1]["level"], "Cure time": 25.0,
                            "Catalyst": 1.0})["predicted"]
    assert_allclose(trace[-1]["mean"], end, rtol=1e-9)
    # three two-factor interactions in the quadratic model, lines at declared low and high
    pairs = built["interactions"].spec["datasets"]
    assert len(pairs) == 3
    assert {d["held"] for d in pairs["pair_0"]} == {"Cure time low (20)", "Cure time high (30)"}


def test_linear_model_has_no_interaction_plot(screening):
    results, _ = screening
    assert "interactions" not in {c.name for c in charts.all_charts(results)}


def test_iso_segments_of_a_plane_lie_exactly_on_its_level_lines():
    """A plane z = 3 + 2x − y: linear interpolation along the cell edges is exact."""
    from app.web.charts_contour import iso_segments, nice_levels

    xs, ys = np.linspace(-1, 1, 11), np.linspace(0, 4, 9)
    gx, gy = np.meshgrid(xs, ys)
    z = 3 + 2 * gx - gy
    levels = nice_levels(z)
    assert levels.tolist() == [-2.0, 0.0, 2.0, 4.0]  # range -3 … 5 in steps of 2
    for level in levels:
        pieces = np.array(iso_segments(xs, ys, z, level))
        assert len(pieces)
        for x, y in (pieces[:, :2].T, pieces[:, 2:].T):
            assert_allclose(3 + 2 * x - y, level, atol=1e-12)


def test_contour_lines_are_labelled_and_close_to_the_model(rsm, validator):
    results, _ = rsm
    chart = charts.contour(results, "Cure temperature", "Cure time")
    assert not list(validator.iter_errors(chart.spec))
    segments = chart.spec["datasets"]["iso"]
    labels = chart.spec["datasets"]["iso_labels"]
    assert len(labels) >= 4 and {d["level"] for d in segments} == {d["level"] for d in labels}
    # each piece's ends sit where predict() gives the line's value (within the grid's
    # interpolation error: the surface is curved, the grid 31 × 31)
    spread = max(c["predicted"] for c in chart.spec["datasets"]["surface"]) - min(
        c["predicted"] for c in chart.spec["datasets"]["surface"])
    for d in segments[::7]:
        at = predict(results, {"Cure temperature": d["x"], "Cure time": d["y"],
                               "Catalyst": 1.0})["predicted"]
        assert abs(at - d["level"]) < 0.01 * spread
    # labels name their values; the held factor is in the subtitle and the note
    assert all(d["text"] == f"{d['level']:g}" for d in labels)
    assert chart.spec["title"]["subtitle"] == "Held: Catalyst at 1 %"
    assert "Held: Catalyst at 1 %" in chart.note and "Lines where" in chart.note
    # the colour bands change exactly at the labelled values, one band more than lines
    heat = next(layer for layer in chart.spec["layer"] if layer.get("name") == "surface")
    scale = heat["encoding"]["color"]["scale"]
    assert scale["type"] == "threshold"
    assert scale["domain"] == sorted(d["level"] for d in labels)
    assert len(scale["range"]) == len(labels) + 1
    assert scale["range"][0] == charts.SURFACE[0] and scale["range"][-1] == charts.SURFACE[-1]


def test_band_colours_run_along_the_palette():
    from app.web.charts_contour import band_colours

    assert band_colours(["#000000", "#ffffff"], 3) == ["#000000", "#808080", "#ffffff"]
    assert band_colours(charts.SURFACE, len(charts.SURFACE)) == charts.SURFACE


def test_half_normal_names_only_the_effects_that_stand_out(saturated):
    results = saturated[0]
    chart = charts.half_normal(results)
    rows = chart.spec["datasets"]["runs"]
    me = results["lenth"]["me"]
    named = {r["term"] for r in rows if r["name"]}
    largest = {r["term"] for r in sorted(rows, key=lambda r: -r["abs_effect"])[:5]}
    assert named == largest | {r["term"] for r in rows if r["abs_effect"] >= me}
    assert len(named) < len(rows)  # the crowd near zero stays unnamed
    # Names of the right-hand points are set to their left: none runs out of the plot.
    top = max(r["quantile"] for r in rows)
    assert all(r["side"] == "left" for r in rows if r["quantile"] == top)


def test_spread_by_level_puts_numeric_levels_in_order(rsm):
    """The CCD's axial levels (one run each, so no SD bar) sit in numeric order among the
    others, not after them."""
    chart = next(c for c in charts.all_charts(rsm[0]) if c.name.startswith("spread_by_level:"))
    for layer in chart.spec["layer"]:
        assert layer["encoding"]["x"]["sort"] == "ascending"
