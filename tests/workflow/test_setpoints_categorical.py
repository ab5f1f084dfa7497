"""Setpoints from an approved fit with a categorical factor, through the services: the proposal
names the level, the tolerance covers the continuous factors only, confirmation runs must be
made at the released level, and the exports list every level compared. The search itself is
checked against statsmodels in tests/analysis/optimize/test_levels.py."""

from __future__ import annotations

import csv
import io

import pytest
from numpy.testing import assert_allclose

from app.analysis.prediction import predict
from app.workflow import (
    WorkflowError,
    confirmations,
    fits,
    setpoint_export,
    setpoint_signoff,
    setpoints,
)
from app.workflow.package import build_package, verify_package
from tests.conftest import PASSWORD
from tests.workflow import helpers as h

GOALS = {"Gloss": {"goal": "maximize"}}


@pytest.fixture
def approved(db, users):
    return h.approved_categorical_fit(db)[1]


def _propose(db, fit_id, fixed=None) -> int:
    with db.transaction() as s:
        return setpoints.propose(s, h.user(s, "erin"), [fits.get_fit(s, fit_id)], GOALS, None,
                                 fixed).id


def _release(db, pid, tolerance):
    def act(s, actor, proof):
        return setpoints.release(s, actor, setpoints.get_proposal(s, pid), proof=proof,
                                 tolerance=tolerance).id

    return h.signed(db, "abel", PASSWORD, setpoints.attempt(pid), act)


def _confirm(db, pid, body: bytes) -> int:
    raw = confirmations.read_file(body, "confirm.csv")
    with db.transaction() as s:
        return confirmations.record(s, h.user(s, "erin"), setpoints.get_proposal(s, pid),
                                    data=body, filename="confirm.csv", raw=raw).id


def test_proposal_names_the_level_and_lists_every_level(db, approved):
    pid = _propose(db, approved)
    with db.session() as s:
        proposal = setpoints.get_proposal(s, pid)
        result = setpoints.result_of(proposal)
        settings = result["optimum"]["settings"]
        doc = fits.results_of(fits.get_fit(s, approved))
        assert settings["Machine"] == "M1"
        assert [i["levels"]["Machine"] for i in result["levels"]["by_level"]] == ["M2", "M1",
                                                                                  "M3"]
        assert_allclose(result["optimum"]["predicted"]["Gloss"],
                        predict(doc, settings)["predicted"], rtol=1e-12)
        assert setpoints.factor_order(s, proposal) == ["Machine", "Speed"]
        assert setpoints.numbered_factors(s, proposal) == ["Speed"]
        assert setpoints.default_tolerance(s, proposal) == {"Speed": 0.2}
        assert "Machine" not in setpoints.resolution_of(s, proposal)
        table = list(csv.reader(io.StringIO(setpoint_export.export_csv(s, proposal).decode())))
    assert ["Machine", "M1", "", "", "M1", "M1", ""] in table
    compared = next(i for i, row in enumerate(table) if row[:1] == ["levels compared"])
    assert "Machine = M1 gives the highest predicted Gloss" in table[compared][1]
    assert [row[0] for row in table[compared + 2:compared + 5]] == [
        "Machine = M2", "Machine = M1", "Machine = M3"]
    assert [row[1] for row in table[compared + 2:compared + 5]] == ["", "chosen", ""]


def test_a_fixed_level_is_kept_and_a_wrong_one_refused(db, approved):
    pid = _propose(db, approved, fixed={"Machine": "M2"})
    with db.session() as s:
        result = setpoints.result_of(setpoints.get_proposal(s, pid))
    assert result["optimum"]["settings"]["Machine"] == "M2"
    assert 14.0 < result["optimum"]["settings"]["Speed"] < 17.0     # M2 peaks mid-range
    with pytest.raises(WorkflowError, match="must be one of M2, M1, M3, not 'M4'") as bad:
        _propose(db, approved, fixed={"Machine": "M4"})
    assert bad.value.field == "Machine"


def test_release_tolerance_covers_continuous_factors_and_runs_keep_the_level(db, approved):
    pid = _propose(db, approved)
    with pytest.raises(WorkflowError, match="names no factor of these setpoints: Machine"):
        _release(db, pid, {"Machine": 0, "Speed": 0.5})
    _release(db, pid, {"Speed": 0.5})
    with db.session() as s:
        proposal = setpoints.get_proposal(s, pid)
        assert setpoint_signoff.tolerance_of(s, proposal) == {"Speed": 0.5}
        speed = setpoints.result_of(proposal)["optimum"]["settings"]["Speed"]
        doc = fits.results_of(fits.get_fit(s, approved))
    at = predict(doc, {"Machine": "M1", "Speed": speed})["predicted"]
    rows = "".join(f"M1,{speed:.2f},{at + d:.2f}\n" for d in (-0.2, 0.1, 0.3))
    wrong = rows.replace("M1", "M3", 1)
    with pytest.raises(WorkflowError, match="Row 1: 'Machine' was run at level 'M3', the "
                                            "released level is 'M1'"):
        _confirm(db, pid, ("Machine,Speed,Gloss\n" + wrong).encode())
    run_id = _confirm(db, pid, ("Machine,Speed,Gloss\n" + rows).encode())
    with db.session() as s:
        judged = confirmations.results_of(s.get(confirmations.ConfirmationRun, run_id))
    assert judged["verdict"] == "pass"
    assert judged["deviations"]["Machine"]["run"] == "M1"
    assert judged["settings_run"]["Machine"] == "M1"
    # the record package carries the level and re-judges the runs offline
    with db.session() as s:
        proposal = setpoints.get_proposal(s, pid)
        data = build_package(s, proposal.study, "test")
    report = verify_package(data)
    assert report.problems == [] and report.confirmation_runs == 1
