"""Setpoints from approved fits only (issue 6): guards, release under the sign-off rules,
confirmation verdicts (the mean of the runs at the settings run), exports."""

from __future__ import annotations

import csv
import io
import json

import pytest
from numpy.testing import assert_allclose
from sqlalchemy import select, text

from app.analysis.optimize import CAUTION
from app.analysis.prediction import predict
from app.store.models import AuditEvent, ConfirmationRun, Fit, SetpointProposal, Signature
from app.workflow import (
    Conflict,
    Forbidden,
    WorkflowError,
    accounts,
    confirmations,
    fits,
    reviews,
    setpoint_export,
    setpoints,
)
from tests.conftest import PASSWORD
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h

GOALS = {"Hardness": {"goal": "maximize", "spec": {"lower": 120}}}


@pytest.fixture
def approved(db, users):
    return h.approved_fit(db)


def propose(db, fit_ids, goals=None, bounds=None, fixed=None, who="erin") -> int:
    with db.transaction() as s:
        chosen = [fits.get_fit(s, i) for i in fit_ids]
        return setpoints.propose(s, h.user(s, who), chosen, goals or GOALS, bounds, fixed).id


def release(db, proposal_id, who="abel", password=PASSWORD, comment=None,
            expected_row_version=None):
    def act(s, actor, proof):
        return setpoints.release(s, actor, setpoints.get_proposal(s, proposal_id), proof=proof,
                                 comment=comment, expected_row_version=expected_row_version).id

    return h.signed(db, who, password, setpoints.attempt(proposal_id), act)


def confirm(db, proposal_id, body: bytes, who="erin", name="confirm.csv", tolerance=None) -> int:
    raw = confirmations.read_file(body, name)  # parsed before the write, as the page does
    with db.transaction() as s:
        return confirmations.record(s, h.user(s, who), setpoints.get_proposal(s, proposal_id),
                                    data=body, filename=name, raw=raw, tolerance=tolerance).id


def _events(db, action):
    with db.session() as s:
        return list(s.scalars(select(AuditEvent).where(AuditEvent.action == action)))


def _pi(db, proposal_id):
    with db.session() as s:
        return setpoints.result_of(s.get(SetpointProposal, proposal_id))["optimum"]["pi"]


def _settings(db, proposal_id):
    with db.session() as s:
        return setpoints.result_of(s.get(SetpointProposal, proposal_id))["optimum"]["settings"]


def test_proposal_stores_inputs_result_and_hash(db, approved):
    _, _, fit_id = approved
    pid = propose(db, [fit_id], bounds={"Catalyst": [0.9, 1.1]})
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        fit = s.get(Fit, fit_id)
        assert proposal.state == "draft" and proposal.row_version == 1
        assert setpoints.proposal_intact(s, proposal)
        doc = setpoints.snapshot_document(proposal, [fit])
        assert doc["fits"] == [{"id": fit_id, "response": "Hardness",
                                "snapshot_sha256": fit.snapshot_sha256}]
        # The spec limits are kept with the goal; the search saw the goal alone.
        assert setpoints.goals_of(proposal)["Hardness"] == {
            "goal": "maximize", "spec": {"lower": 120.0, "upper": None}}
        result = setpoints.result_of(proposal)
        settings = result["optimum"]["settings"]
        assert 0.9 - 1e-9 <= settings["Catalyst"] <= 1.1 + 1e-9
        # The stored PI is the one app.analysis.predict gives at the stored settings
        # (cross-check of the stored document against the prediction function).
        again = predict(fits.results_of(fit), settings)
        assert_allclose(result["optimum"]["pi"]["Hardness"], again["pi"], rtol=1e-10, atol=0)
        assert result["caution"] == CAUTION
    (event,) = _events(db, "setpoint.propose")
    assert json.loads(event.new_json)["snapshot_sha256"] == proposal.snapshot_sha256


def test_draft_fit_is_refused(db, users):
    study = h.make_study(db)
    fit_id = h.make_fit(db, h.add_version(db, study))
    with pytest.raises(Conflict, match="is draft, not approved"):
        propose(db, [fit_id])


def test_superseded_fit_is_refused(db, approved):
    _, version_id, first = approved
    second = h.make_fit(db, version_id, model="quadratic")
    h.submit(db, second)
    h.sign(db, second)
    with pytest.raises(Conflict, match="superseded"):
        propose(db, [first])
    assert propose(db, [second]) > 0


def test_withdrawn_fit_is_refused(db, approved):
    _, _, fit_id = approved
    h.withdraw(db, fit_id, who="abel", reason="gauge found out of calibration")
    with pytest.raises(Conflict, match="withdrawn"):
        propose(db, [fit_id])


def test_approval_of_older_data_no_longer_applies(db, approved):
    study_id, _, fit_id = approved
    h.add_version(db, study_id, reason="row 4 typed wrongly")
    with pytest.raises(Conflict, match="no longer applies: data version 2 is newer"):
        propose(db, [fit_id])


def test_altered_results_make_the_approval_invalid(db, approved):
    _, _, fit_id = approved
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, fit_id).results_json)
        doc["model"]["coefficients"][0] += 5.0
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": json.dumps(doc), "i": fit_id})
    with pytest.raises(Conflict, match="signature of fit .* is invalid"):
        propose(db, [fit_id])


@pytest.mark.parametrize("bounds, fixed, field", [
    ({"Cure temperature": [150, 200]}, None, "Cure temperature"),
    (None, {"Cure time": 60}, "Cure time"),
])
def test_request_leaving_the_design_region_is_a_conflict(db, approved, bounds, fixed, field):
    _, _, fit_id = approved
    with pytest.raises(Conflict, match="leaves the design region") as info:
        propose(db, [fit_id], bounds=bounds, fixed=fixed)
    assert info.value.field == field
    with db.session() as s:
        assert s.scalar(select(SetpointProposal.id)) is None


@pytest.mark.parametrize("goals, field", [
    ({"Hardness": {"goal": "highest"}}, "goal"),
    ({"Viscosity": {"goal": "maximize"}}, "goals"),
    ({"Hardness": {"goal": "maximize", "spec": {"lower": "soft"}}}, "goals.Hardness.spec.lower"),
    ({"Hardness": {"goal": "target", "target": 130, "lower": 125, "upper": 128}}, "target"),
    ({"Hardness": {"goal": "maximize", "low": 125}}, "goals.Hardness.low"),
    ({"Hardness": {"goal": "maximize", "importance": 2}}, "goals.Hardness.importance"),
    ({"Hardness": {"goal": "in_range", "lower": 100}}, "goals.Hardness.goal"),
    ({"Hardness": {"goal": "within", "lower": 100}}, "goals"),
])
def test_bad_goals_name_the_field(db, approved, goals, field):
    _, _, fit_id = approved
    with pytest.raises(WorkflowError) as info:
        propose(db, [fit_id], goals=goals)
    assert info.value.status == 400 and info.value.field == field


def test_one_fit_per_response_and_one_study(db, approved):
    study_id, version_id, fit_id = approved
    with db.session() as s:
        with pytest.raises(WorkflowError, match="one fit per response"):
            setpoints._check_fit_set([s.get(Fit, fit_id), s.get(Fit, fit_id)])
    other_study, _, other_fit = h.approved_fit(db)
    with pytest.raises(WorkflowError, match="same study"):
        propose(db, [fit_id, other_fit])


def test_release_signs_the_proposal_snapshot(db, approved):
    _, _, fit_id = approved
    pid = propose(db, [fit_id])
    sig_id = release(db, pid, comment="Cure window agreed with line 2 supervisor.")
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        sig = s.get(Signature, sig_id)
        assert (proposal.state, proposal.row_version) == ("released", 2)
        assert sig.setpoint_id == pid and sig.fit_id is None
        assert sig.snapshot_sha256 == proposal.snapshot_sha256
        assert sig.printed_name == "Abel Approver" and sig.meaning == setpoints.RELEASE
        assert sig.manifest_sha256 == setpoints.manifest_sha256(sig)
        assert setpoints.signature_check(s, proposal, sig).status == reviews.VALID
    (event,) = _events(db, "setpoint.release")
    assert json.loads(event.old_json) == {"state": "draft", "row_version": 1}


def test_own_proposal_cannot_be_released_by_its_author(db, approved):
    study_id, _, fit_id = approved
    with db.transaction() as s:
        accounts.create_user(s, None, username="bea", full_name="Bea Both",
                             roles="engineer,approver", password=PASSWORD)
    h.join(db, study_id, "bea")
    pid = propose(db, [fit_id], who="bea")
    with pytest.raises(Forbidden, match="someone else must sign"):
        release(db, pid, who="bea")


def test_engineer_cannot_release(db, approved):
    pid = propose(db, [approved[2]])
    with pytest.raises(Forbidden, match="approver role"):
        release(db, pid, who="erin")


def test_wrong_password_signs_nothing(db, approved):
    pid = propose(db, [approved[2]])
    with pytest.raises(setpoints.SignatureRefused):
        release(db, pid, password="not the password")
    with db.session() as s:
        assert s.get(SetpointProposal, pid).state == "draft"
        assert s.scalar(select(Signature.id).where(Signature.setpoint_id == pid)) is None
    assert len(_events(db, "signature.refused")) == 1


def test_release_twice_and_stale_version_are_conflicts(db, approved):
    pid = propose(db, [approved[2]])
    with pytest.raises(Conflict, match="changed since"):
        release(db, pid, expected_row_version=7)
    release(db, pid)
    with pytest.raises(Conflict, match="only a proposal that is proposed"):
        release(db, pid, who="ada")


def test_release_refused_when_the_fit_was_superseded_meanwhile(db, approved):
    _, version_id, fit_id = approved
    pid = propose(db, [fit_id])
    newer = h.make_fit(db, version_id, model="quadratic")
    h.submit(db, newer)
    h.sign(db, newer)
    with pytest.raises(Conflict, match="superseded"):
        release(db, pid)


def test_altered_proposal_cannot_be_released_and_its_signature_shows_invalid(db, approved):
    pid = propose(db, [approved[2]])
    other = propose(db, [approved[2]])
    release(db, other)
    for target in (pid, other):
        with db.transaction() as s:
            doc = json.loads(s.get(SetpointProposal, target).result_json)
            doc["optimum"]["pi"]["Hardness"] = [0.0, 1000.0]
            drop_signed_row_triggers(s)
            s.execute(text("UPDATE setpoint_proposals SET result_json = :j WHERE id = :i"),
                      {"j": json.dumps(doc), "i": target})
    with pytest.raises(Conflict, match="no longer matches its recorded SHA-256"):
        release(db, pid)
    with db.session() as s:
        proposal = s.get(SetpointProposal, other)
        (sig,) = setpoints.release_signatures(s, proposal)
        assert setpoints.signature_check(s, proposal, sig).status == reviews.INVALID
    with pytest.raises(Conflict):
        confirm(db, other, b"Hardness\n500\n")


def test_confirmation_before_release_is_a_conflict(db, approved):
    pid = propose(db, [approved[2]])
    with pytest.raises(Conflict, match="only at setpoints released for confirmation"):
        confirm(db, pid, b"Hardness\n130\n")
    with db.session() as s:
        assert s.scalar(select(ConfirmationRun.id)) is None


def test_confirmation_judges_the_mean_of_the_runs(db, approved):
    # The issue: one of three runs below the single-observation PI, the three averaging the
    # prediction. Under the rule of DESIGN.md (mean of m against the interval for the mean of
    # m) the set passes and the low run is flagged as information only.
    pid = propose(db, [approved[2]])
    release(db, pid)
    low, high = _pi(db, pid)["Hardness"]
    middle = (low + high) / 2                  # the prediction: the PI is symmetric about it
    first = low - 0.3
    rest = (3 * middle - first) / 2
    assert rest < high                          # the other two runs are inside the single PI
    body = f"Run,Hardness\nC1,{first!r}\nC2,{rest!r}\nC3,{rest!r}\n".encode()
    run_id = confirm(db, pid, body)
    high_runs = f"Run,Hardness\nC4,{high + 0.5:.3f}\nC5,{high + 0.5:.3f}\n".encode()
    second = confirm(db, pid, high_runs)
    with db.session() as s:
        good = confirmations.results_of(s.get(ConfirmationRun, run_id))
        bad = confirmations.results_of(s.get(ConfirmationRun, second))
    hardness = good["responses"]["Hardness"]
    assert hardness["inside"] == [False, True, True] and hardness["outside_single_pi_rows"] == [1]
    assert hardness["verdict"] == "pass" and good["verdict"] == "pass" and good["m"] == 3
    assert_allclose(hardness["mean"], middle, rtol=1e-12)
    assert hardness["interval_for_mean"][0] > low and hardness["interval_for_mean"][1] < high
    assert good["rule"].startswith("For each response the mean of the m confirmation runs")
    assert good["settings_notes"] == [
        "The file records no setting for Cure temperature, Cure time, Catalyst: the released "
        "value is assumed for them."]
    assert bad["responses"]["Hardness"]["inside"] == [False, False]
    assert bad["responses"]["Hardness"]["verdict"] == "fail" and bad["verdict"] == "fail"
    events = _events(db, "setpoint.confirmation")
    assert [json.loads(e.new_json)["verdict"] for e in events] == ["pass", "fail"]


def test_confirmation_reads_the_settings_run_from_the_file(db, approved):
    pid = propose(db, [approved[2]])
    release(db, pid)
    released = _settings(db, pid)
    run_at = {**released, "Cure temperature": released["Cure temperature"] + 1.5}
    header = ",".join(["Run", *run_at, "Hardness"])
    cells = ",".join(repr(v) for v in run_at.values())
    body = f"{header}\nC1,{cells},130\nC2,{cells},131\n".encode()
    # Beyond the tolerance: refused before anything is judged or stored.
    with pytest.raises(WorkflowError, match="'Cure temperature' was run at .*, the released "
                                            "value is .* and the tolerance set at release is "
                                            "±1") as info:
        confirm(db, pid, body, tolerance={"Cure temperature": 1.0})
    assert info.value.field == "file"
    run_id = confirm(db, pid, body, tolerance={"Cure temperature": 2.0})
    with db.session() as s:
        doc = confirmations.results_of(s.get(ConfirmationRun, run_id))
        fit = s.get(Fit, approved[2])
        at_run = predict(fits.results_of(fit), run_at, m=2)
    assert doc["settings"] == released and doc["settings_run"] == run_at
    assert doc["deviations"]["Cure temperature"]["deviation"] == pytest.approx(1.5)
    assert doc["tolerance"] == {"Cure temperature": 2.0}
    # the interval is the one at the settings run, not at the released point
    assert_allclose(doc["responses"]["Hardness"]["interval_for_mean"], at_run["pi"], rtol=1e-12)


def test_judge_is_inclusive_at_the_interval_ends():
    # Hand-made interval: the ends themselves count as inside (closed interval).
    out = confirmations.judge({"Y": [(1, 10.0), (2, 12.0), (3, 12.0001)]}, {"Y": [10.0, 12.0]})
    assert out["Y"]["inside"] == [True, True, False] and out["Y"]["verdict"] == "fail"


@pytest.mark.parametrize("body, message", [
    (b"Run,Gloss\nC1,86\n", "no column 'Hardness'"),
    (b"Run,Hardness\nC1,soft\n", "Row 1, column 'Hardness': 'soft' is not a number"),
    (b"Run,Hardness\nC1,\n", "holds no values"),
    (b"Run,Catalyst,Hardness\nC1,1.1,130\nC2,lots,131\n",
     "Row 2, column 'Catalyst': 'lots' is not a number"),
    (b"Run,Catalyst,Hardness\nC1,1.1,130\nC2,,131\n",
     "Row 2, column 'Catalyst': the setting is missing"),
])
def test_bad_confirmation_files_name_row_and_column(db, approved, body, message):
    pid = propose(db, [approved[2]])
    release(db, pid)
    with pytest.raises(WorkflowError, match=message) as info:
        confirm(db, pid, body)
    assert info.value.field == "file" and info.value.status == 400


def test_exports_carry_fits_hashes_signatures_chain_head_and_caution(db, approved):
    _, _, fit_id = approved
    pid = propose(db, [fit_id])
    release(db, pid, comment="=HYPERLINK(\"http://x\")")
    low, high = _pi(db, pid)["Hardness"]
    confirm(db, pid, f"Hardness\n{(low + high) / 2:.3f}\n".encode())
    with db.session() as s:
        proposal = s.get(SetpointProposal, pid)
        fit = s.get(Fit, fit_id)
        doc = setpoint_export.export_json(s, proposal)
        body = setpoint_export.export_csv(s, proposal).decode()
        head = s.execute(text("SELECT seq, hash FROM chain_head")).one()
    assert doc["caution"] == CAUTION
    assert doc["fits"][0]["id"] == fit_id
    assert doc["fits"][0]["snapshot_sha256"] == fit.snapshot_sha256
    assert doc["fits"][0]["approvals"][0]["printed_name"] == "Abel Approver"
    assert doc["signatures"][0]["printed_name"] == "Abel Approver"
    assert doc["signatures"][0]["meaning"] == setpoints.RELEASE
    assert doc["signatures"][0]["status"] == "valid"
    assert doc["confirmations"][0]["verdict"] == "pass"
    assert doc["chain_head"] == {"seq": head[0], "hash": head[1]}
    rows = list(csv.reader(io.StringIO(body)))
    assert rows[0] == ["caution", CAUTION]
    flat = [cell for row in rows for cell in row]
    assert fit.snapshot_sha256 in flat and proposal.snapshot_sha256 in flat and head[1] in flat
    assert "'=HYPERLINK(\"http://x\")" in flat
    assert "Abel Approver" in flat


@pytest.mark.parametrize("cell, shown", [
    ("=1+2", "'=1+2"), ("@SUM(A1)", "'@SUM(A1)"), ("+cmd", "'+cmd"), ("-x", "'-x"),
    ("\tx", "'\tx"), ("\rx", "'\rx"), ("-1.5", "-1.5"), ("+2e3", "+2e3"), (-0.25, "-0.25"),
    ("plain", "plain"), (None, ""),
])
def test_csv_cells_are_neutralised_unless_plain_numbers(cell, shown):
    assert setpoint_export.neutralise(cell) == shown
