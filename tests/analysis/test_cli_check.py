"""``plumbline check`` through click's test runner: summary, JSON, awkward names, bad input."""

import json

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import ccd

from app.cli_check import check_command


@pytest.fixture
def ccd_csv(tmp_path):
    x = ccd(3, 1.682, 6)
    rng = np.random.default_rng(1)
    y = 60 + 4 * x[:, 0] - 2 * x[:, 1] - 1.5 * x[:, 2] ** 2 + rng.normal(size=20)
    lines = ["Run,Feed rate,C,I,Yield"]
    for i, (row, v) in enumerate(zip(x, y, strict=True)):
        lines.append(f"{i + 1},{40 + 5 * row[0]:.4f},{row[1]:.4f},{row[2]:.4f},{v:.4f}")
    path = tmp_path / "study.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _run(args):
    return CliRunner().invoke(check_command, [str(a) for a in args])


def test_summary_lists_every_check_verdict(ccd_csv):
    res = _run([ccd_csv, "--response", "Yield", "--factors", "Feed rate,C,I", "--run-order", "Run",
                "--model", "quadratic", "--levels", "Feed rate=35:45",
                "--exclude", "4=spilled sample"])
    assert res.exit_code == 0, res.output
    assert "Residual checks" in res.output
    for cid in ("normality", "run_order_autocorrelation", "lack_of_fit", "pattern_factor:Feed rate",
                "constant_variance_factor:I"):
        assert cid in res.output
    assert "Feed rate^2" in res.output


def test_json_output_with_terms_named_c_and_i(ccd_csv):
    res = _run([ccd_csv, "--response", "Yield", "--factors", "Feed rate,C,I", "--coded",
                "--terms", "Feed rate,C,I,C:I,I^2", "--json",
                "--thresholds", "review=0.1,fail=0.02"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.output)
    assert doc["terms"] == ["Feed rate", "C", "I", "C:I", "I^2"]
    assert doc["spec"]["thresholds"] == {"review": 0.1, "fail": 0.02}
    assert doc["spec"]["run_order"] == "Run"  # suggested from the header, kept without a flag
    assert doc["checks"][1]["id"] == "run_order_autocorrelation"


@pytest.mark.parametrize(("args", "needle"), [
    (["--response", "Nope"], "Column 'Nope'"),
    (["--response", "Yield", "--terms", "C Q"], "'Q' is not a factor name"),
    (["--response", "Yield", "--exclude", "3"], "ROW=reason"),
    (["--response", "Yield", "--exclude", "99=typo"], "row 99"),
    (["--response", "Yield", "--transform", "log", "--levels", "C=1:1"], "low"),
])
def test_bad_input_exits_2_with_message(ccd_csv, args, needle):
    res = _run([ccd_csv, *args])
    assert res.exit_code == 2
    assert needle in res.output + (res.stderr or "")


def test_unreadable_cell_is_reported_by_row_and_column(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("A,B,Y\n-1,-1,3\n1,-1,abc\n-1,1,4\n1,1,5\n0,0,4\n")
    res = _run([path, "--response", "Y", "--factors", "A,B"])
    assert res.exit_code == 2
    assert "row 2" in res.stderr and "Y" in res.stderr


def test_missing_file_exits_2(tmp_path):
    res = _run([tmp_path / "none.csv", "--response", "Y"])
    assert res.exit_code == 2


def test_goal_adds_optimum_and_stationary_point_to_json():
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "app" / "demo" / "rsm_demo.csv"
    result = _run([demo, "--response", "Hardness", "--model", "quadratic", "--goal",
                   "maximize", "--json"])
    assert result.exit_code == 0, result.output
    doc = json.loads(result.output)
    opt, sp = doc["optimum"], doc["stationary_point"]
    assert set(opt) >= {"coded", "settings", "predicted", "ci", "pi", "desirability"}
    assert opt["ci"][0] < opt["predicted"] < opt["ci"][1]
    assert opt["pi"][0] < opt["ci"][0] and opt["ci"][1] < opt["pi"][1]
    assert all(-1.682 - 1e-9 <= v <= 1.682 + 1e-9 for v in opt["coded"].values())
    assert sp["kind"] == "maximum" and all(e < 0 for e in sp["eigenvalues"])
    # The maximum of a concave quadratic inside the region is its stationary point.
    for name, value in sp["coded"].items():
        assert abs(opt["coded"][name] - value) < 1e-3
    assert "Confirmation runs are required" in doc["setpoint_caution"]
    assert doc["setpoint_region"]["shape"] == "sphere" and doc["setpoint_region"]["why"]
    assert doc["setpoint_check"]["status"] == "agrees"
    assert doc["setpoint_edge"] is None  # the maximum is inside the sphere
    low = _run([demo, "--response", "Hardness", "--model", "quadratic", "--goal", "minimize"])
    assert "The proposal lies on the boundary of the region searched (the sphere 1.682 coded " \
           "units from the centre)" in low.output
    # the page's search (propose) gives the command line's settings on the same fit
    from app.analysis.optimize import propose

    fit_doc = {k: v for k, v in doc.items() if not k.startswith("setpoint_")}
    page = propose({"Hardness": fit_doc}, {"Hardness": {"goal": "maximize"}})
    for name, value in opt["settings"].items():
        assert abs(page["optimum"]["settings"][name] - value) <= 1e-6 * abs(value)


def test_goal_text_and_bad_goal():
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "app" / "demo" / "rsm_demo.csv"
    text = _run([demo, "--response", "Hardness", "--model", "quadratic", "--goal", "target=125"])
    assert text.exit_code == 0 and "Setting search (target=125)" in text.output
    assert "CAUTION" in text.output
    bad = _run([demo, "--response", "Hardness", "--model", "quadratic", "--goal", "biggest"])
    assert bad.exit_code == 2 and "goal" in bad.output.lower()


def test_earlier_range_goal_is_refused_with_its_new_name():
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "app" / "demo" / "rsm_demo.csv"
    old = _run([demo, "--response", "Hardness", "--model", "quadratic", "--goal", "in_range"])
    assert old.exit_code == 2
    assert "no longer accepted" in old.output and "'within'" in old.output


def test_goal_with_a_categorical_factor_names_the_level(tmp_path):
    """A text column of few names is a categorical factor; the search runs at each level and
    the text lists them (the numbers themselves are checked in optimize/test_levels.py)."""
    from tests.workflow.helpers import GLOSS_CSV

    path = tmp_path / "gloss.csv"
    path.write_bytes(GLOSS_CSV)
    text = _run([path, "--response", "Gloss", "--factors", "Machine,Speed", "--model",
                 "quadratic", "--goal", "maximize"])
    assert text.exit_code == 0, text.output
    assert "Machine                  M1   (level)" in text.output
    assert "Machine = M1 gives the highest predicted Gloss" in text.output
    assert text.output.count("predicted") >= 4 and "(proposed)" in text.output
    as_json = _run([path, "--response", "Gloss", "--factors", "Machine,Speed", "--model",
                    "quadratic", "--goal", "maximize", "--json"])
    doc = json.loads(as_json.output)
    assert doc["optimum"]["settings"]["Machine"] == "M1"
    assert [i["levels"]["Machine"] for i in doc["setpoint_levels"]["by_level"]] == [
        "M2", "M1", "M3"]
