"""The setpoint sheet's sign-off: proposed → released for confirmation → confirmed for
production, or returned, or withdrawn; a failed confirmation never reads as released."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select

from app.store.models import AuditEvent, SetpointProposal
from app.workflow import Conflict, Forbidden, WorkflowError, setpoint_signoff, setpoints
from app.workflow.replay import disagreements
from app.workflow.setpoint_signoff import CONFIRM, RELEASE, RETURN, WITHDRAW, state_label
from tests.conftest import PASSWORD
from tests.workflow import helpers as h
from tests.workflow.test_setpoints import _pi, confirm, propose


@pytest.fixture
def proposal(db, users) -> int:
    _study, _version, fit_id = h.approved_fit(db)
    return propose(db, [fit_id])


def sign(db, pid, meaning, who="abel", comment=None, tolerance=None):
    def act(s, actor, proof):
        found = setpoints.get_proposal(s, pid)
        return setpoint_signoff.sign(s, actor, found, meaning=meaning, proof=proof,
                                     comment=comment, tolerance=tolerance).id

    return h.signed(db, who, PASSWORD, setpoint_signoff.attempt(pid, meaning), act)


def release(db, pid, **kwargs):
    with db.session() as s:
        tolerance = setpoints.default_tolerance(s, s.get(SetpointProposal, pid))
    return sign(db, pid, RELEASE, tolerance=kwargs.pop("tolerance", tolerance), **kwargs)


def state(db, pid) -> tuple[str, str, bool]:
    with db.session() as s:
        found = s.get(SetpointProposal, pid)
        return found.state, state_label(found.state), setpoint_signoff.for_production(found)


def runs_inside(db, pid) -> bytes:
    low, high = _pi(db, pid)["Hardness"]
    return f"Run,Hardness\nC1,{(low + high) / 2:.4f}\n".encode()


def runs_outside(db, pid) -> bytes:
    low, high = _pi(db, pid)["Hardness"]
    return f"Run,Hardness\nC1,{high + 5 * (high - low):.4f}\n".encode()


def trail_agrees(db) -> None:
    with db.session() as s:
        assert [d.describe() for d in disagreements(s)] == []


def test_released_is_for_confirmation_and_confirmed_is_for_production(db, proposal):
    assert state(db, proposal) == ("draft", "proposed", False)
    release(db, proposal, tolerance={"Catalyst": 0.01, "Cure temperature": 1.5,
                                     "Cure time": 0.5})
    assert state(db, proposal) == ("released", "released for confirmation", False)
    with db.session() as s:
        found = s.get(SetpointProposal, proposal)
        assert setpoint_signoff.tolerance_of(s, found) == {
            "Catalyst": 0.01, "Cure temperature": 1.5, "Cure time": 0.5}
    with pytest.raises(Conflict, match="no confirmation runs yet"):
        sign(db, proposal, CONFIRM)
    confirm(db, proposal, runs_inside(db, proposal))
    assert state(db, proposal)[0] == "released"
    sign(db, proposal, CONFIRM, who="ada", comment="Three runs on line 2 agreed.")
    assert state(db, proposal) == ("confirmed", "confirmed for production", True)
    with db.session() as s:
        actions = [e.action for e in s.scalars(
            select(AuditEvent).where(AuditEvent.object_type == "setpoint")
            .order_by(AuditEvent.seq))]
    # The early confirmation (no runs yet) was refused, and that is on the record too.
    assert actions == ["setpoint.propose", "setpoint.release", "signature.refused",
                       "setpoint.confirmation", "setpoint.confirm"]
    trail_agrees(db)


def test_a_failed_confirmation_is_never_released_and_only_withdrawn(db, proposal):
    release(db, proposal)
    confirm(db, proposal, runs_outside(db, proposal))
    assert state(db, proposal) == ("failed", "confirmation failed", False)
    with pytest.raises(Conflict, match="confirmation failed"):
        sign(db, proposal, CONFIRM)
    with pytest.raises(Conflict, match="is confirmation failed"):
        confirm(db, proposal, runs_inside(db, proposal))
    with pytest.raises(WorkflowError, match="give the reason"):
        sign(db, proposal, WITHDRAW)
    sign(db, proposal, WITHDRAW, comment="Hardness low on all three runs; rework the model.")
    assert state(db, proposal) == ("withdrawn", "withdrawn", False)
    trail_agrees(db)


def test_an_approver_returns_a_proposal_with_reasons(db, proposal):
    with pytest.raises(WorkflowError, match="give the reason"):
        sign(db, proposal, RETURN)
    sign(db, proposal, RETURN, comment="Bound cure time to the oven's real range first.")
    assert state(db, proposal) == ("returned", "returned", False)
    with pytest.raises(Conflict, match="is returned"):
        release(db, proposal)
    with db.session() as s:
        (sig,) = setpoints.release_signatures(s, s.get(SetpointProposal, proposal))
        assert (sig.meaning, sig.comment) == (RETURN, "Bound cure time to the oven's real "
                                                      "range first.")
    trail_agrees(db)


def test_confirmed_setpoints_can_be_withdrawn(db, proposal):
    release(db, proposal)
    confirm(db, proposal, runs_inside(db, proposal))
    sign(db, proposal, CONFIRM)
    sign(db, proposal, WITHDRAW, who="ada", comment="Catalyst supplier changed.")
    assert state(db, proposal)[0] == "withdrawn"
    trail_agrees(db)


def test_the_author_signs_none_of_the_transitions(db, users):
    from app.workflow import accounts

    with db.transaction() as s:
        accounts.create_user(s, None, username="bea", full_name="Bea Both",
                             roles="engineer,approver", password=PASSWORD)
    study_id, _version, fit_id = h.approved_fit(db)
    h.join(db, study_id, "bea")
    pid = propose(db, [fit_id], who="bea")
    for meaning in (RELEASE, RETURN):
        with pytest.raises(Forbidden, match="someone else must sign"):
            sign(db, pid, meaning, who="bea", comment="mine",
                 tolerance={"Catalyst": 0, "Cure temperature": 0, "Cure time": 0})


@pytest.mark.parametrize("tolerance, field", [
    (None, "tolerance"),
    ({"Catalyst": 0.01}, "tolerance.Cure temperature"),
    ({"Catalyst": -1, "Cure temperature": 1, "Cure time": 1}, "tolerance.Catalyst"),
    ({"Catalyst": "a lot", "Cure temperature": 1, "Cure time": 1}, "tolerance.Catalyst"),
    ({"Catalyst": 1, "Cure temperature": 1, "Cure time": 1, "Speed": 1}, "tolerance.Speed"),
])
def test_a_release_names_the_tolerance_it_lacks(db, proposal, tolerance, field):
    with pytest.raises(WorkflowError) as caught:
        sign(db, proposal, RELEASE, tolerance=tolerance)
    assert caught.value.field == field
    assert state(db, proposal)[0] == "draft"


def test_an_unknown_meaning_is_refused_and_recorded(db, proposal):
    with pytest.raises(WorkflowError, match="Choose the meaning"):
        sign(db, proposal, "approved for everything")
    with db.session() as s:
        refused = s.scalars(select(AuditEvent).where(AuditEvent.object_type == "setpoint",
                                                     AuditEvent.action.like("%refused%"))).all()
    assert refused and json.loads(refused[-1].new_json)["cause"]


def test_the_export_rounds_settings_to_the_data_and_names_the_units(db, proposal):
    import csv
    import io

    from app.workflow import setpoint_export

    with db.session() as s:
        found = s.get(SetpointProposal, proposal)
        rows = list(csv.reader(io.StringIO(setpoint_export.export_csv(s, found).decode())))
        doc = setpoint_export.export_json(s, found)
    header = rows.index(["factor", "setting", "units", "resolution (from the data)",
                         "setting (full value)", "setting (coded units)",
                         "fixed by the engineer"])
    settings = {r[0]: r for r in rows[header + 1:header + 4]}
    # The demo file writes temperatures and times with up to 2 decimals (axial points such as
    # 143.18), the catalyst with up to 4 (its axial points) and Hardness with 1 (counted with
    # the csv module over the file's text, not with the project's code).
    assert doc["resolution"] == pytest.approx({"Cure temperature": 0.01, "Cure time": 0.01,
                                               "Catalyst": 0.0001, "Hardness": 0.1})
    assert doc["units"] == {"Cure temperature": "°C", "Cure time": "min", "Catalyst": "%"}
    for name, row in settings.items():
        step = float(row[3])
        full = float(row[4])
        assert abs(float(row[1]) - full) <= step / 2 + 1e-12
        decimals = len(row[1].split(".")[1]) if "." in row[1] else 0
        assert decimals == len(row[3].split(".")[1]) if "." in row[3] else decimals == 0
        assert row[2] == (doc["units"][name] or "")
