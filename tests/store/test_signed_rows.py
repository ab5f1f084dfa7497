"""Signatures, fit snapshots and setpoint proposal snapshots (migration 0005): the database
refuses to change or remove them on both backends, while the sign-off states still move."""

from __future__ import annotations

import pytest
from sqlalchemy import select, text
from sqlalchemy.exc import DatabaseError

from app.store.models import Fit, SetpointProposal, Signature
from app.workflow import fits, reviews, setpoints
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h

GOALS = {"Hardness": {"goal": "maximize", "spec": {"lower": 120}}}


@pytest.fixture
def rows(db, users) -> dict[str, int]:
    """An approved fit with its signature, a draft fit, and a proposal from the approved fit."""
    _, version_id, fit_id = h.approved_fit(db)
    draft_id = h.make_fit(db, version_id, model="linear")
    with db.transaction() as s:
        sig_id = s.scalar(select(Signature.id).where(Signature.fit_id == fit_id))
        proposal = setpoints.propose(s, h.user(s, "erin"), [fits.get_fit(s, fit_id)], GOALS,
                                     None, None)
        return {"fit": fit_id, "draft": draft_id, "sig": sig_id, "proposal": proposal.id}


def _refused(db, statement: str, params: dict, message: str) -> None:
    with pytest.raises(DatabaseError, match=message), db.transaction() as s:
        s.execute(text(statement), params)


@pytest.mark.parametrize("statement, key", [
    ("UPDATE signatures SET meaning = 'returned for rework' WHERE id = :i", "sig"),
    ("UPDATE signatures SET comment = 'later note' WHERE id = :i", "sig"),
    ("DELETE FROM signatures WHERE id = :i", "sig"),
])
def test_signatures_cannot_change_or_go(db, rows, statement, key):
    _refused(db, statement, {"i": rows[key]}, "signatures are append-only")
    with db.session() as s:
        sig = s.get(Signature, rows["sig"])
        assert sig.meaning == reviews.APPROVE and sig.comment == ""


@pytest.mark.parametrize("statement, key", [
    ("UPDATE fits SET results_json = '{}' WHERE id = :i", "fit"),
    ("UPDATE fits SET spec_json = '{}' WHERE id = :i", "draft"),
    ("UPDATE fits SET thresholds_json = '{\"review\": 0.2}' WHERE id = :i", "fit"),
    ("UPDATE fits SET software_version = 'other' WHERE id = :i", "fit"),
    ("UPDATE fits SET snapshot_sha256 = 'ab' WHERE id = :i", "fit"),
    ("UPDATE fits SET data_version_id = data_version_id + 1 WHERE id = :i", "draft"),
    ("UPDATE fits SET response = 'Gloss' WHERE id = :i", "fit"),
    ("UPDATE fits SET seal = NULL WHERE id = :i", "fit"),
    ("UPDATE fits SET key_id = 'other' WHERE id = :i", "draft"),
    ("UPDATE fits SET state = 'draft', results_json = '{}' WHERE id = :i", "fit"),
    ("DELETE FROM fits WHERE id = :i", "draft"),
    ("DELETE FROM fits WHERE id = :i", "fit"),
])
def test_fit_snapshots_cannot_change_or_go(db, rows, statement, key):
    _refused(db, statement, {"i": rows[key]}, "fit snapshots are immutable")
    with db.session() as s:
        for key in ("fit", "draft"):
            assert fits.snapshot_intact(s.get(Fit, rows[key]))
        assert s.get(Fit, rows["fit"]).state == "approved"


@pytest.mark.parametrize("statement", [
    "UPDATE setpoint_proposals SET result_json = '{}' WHERE id = :i",
    "UPDATE setpoint_proposals SET goals_json = '{}' WHERE id = :i",
    "UPDATE setpoint_proposals SET fit_ids_json = '[]' WHERE id = :i",
    "UPDATE setpoint_proposals SET snapshot_sha256 = 'ab' WHERE id = :i",
    "DELETE FROM setpoint_proposals WHERE id = :i",
])
def test_setpoint_snapshots_cannot_change_or_go(db, rows, statement):
    _refused(db, statement, {"i": rows["proposal"]}, "setpoint proposal snapshots are immutable")
    with db.session() as s:
        assert setpoints.proposal_intact(s, s.get(SetpointProposal, rows["proposal"]))


def test_states_still_move(db, rows):
    with db.session() as s:
        before = s.get(Fit, rows["fit"]).row_version
    with db.transaction() as s:
        s.execute(text("UPDATE fits SET state = 'returned', row_version = row_version + 1 "
                       "WHERE id = :i"), {"i": rows["fit"]})
        # Setting a snapshot column to the value it already has changes nothing: let through.
        s.execute(text("UPDATE fits SET results_json = results_json, response = response "
                       "WHERE id = :i"), {"i": rows["draft"]})
        s.execute(text("UPDATE setpoint_proposals SET state = 'released', "
                       "row_version = row_version + 1 WHERE id = :i"), {"i": rows["proposal"]})
    with db.session() as s:
        fit = s.get(Fit, rows["fit"])
        assert (fit.state, fit.row_version) == ("returned", before + 1)
        assert s.get(SetpointProposal, rows["proposal"]).state == "released"


def test_the_workflow_runs_under_the_triggers(db, rows):
    h.submit(db, rows["draft"])
    h.sign(db, rows["draft"], meaning=reviews.RETURN, comment="Add the centre points.")
    with db.session() as s:
        fit = s.get(Fit, rows["draft"])
        assert fit.state == "returned" and fits.snapshot_intact(fit)
        assert [sig.meaning for sig in fit.signatures] == [reviews.RETURN]


def test_a_writer_who_drops_the_triggers_can_tamper(db, rows):
    """What the hashes are for: the triggers are a barrier, not the only check."""
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET software_version = 'other' WHERE id = :i"),
                  {"i": rows["fit"]})
        s.execute(text("DELETE FROM signatures WHERE id = :i"), {"i": rows["sig"]})
    with db.session() as s:
        assert not fits.snapshot_intact(s.get(Fit, rows["fit"]))
        assert s.get(Signature, rows["sig"]) is None
