"""Fit snapshots: stored once, hashed, and any later change shows."""

from __future__ import annotations

import hashlib
import json

import pytest
from sqlalchemy import select, text
from sqlalchemy.exc import DBAPIError

from app.analysis import Thresholds
from app.store.models import AuditEvent, Fit, FitRuns, User
from app.workflow import WorkflowError, fits, replay, uploads
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow.helpers import add_version, make_study


@pytest.fixture
def version(db, users):
    return add_version(db, make_study(db))


def _fit(db, version_id, **choices):
    with db.transaction() as s:
        erin = s.scalar(select(User).where(User.username == "erin"))
        v = uploads.get_data_version(s, version_id)
        spec = fits.build_spec(v, thresholds=Thresholds(), **choices)
        return fits.create_fit(s, erin, v, spec).id


def test_fit_snapshot_is_hashed_and_audited(db, version):
    fit_id = _fit(db, version, response="Hardness", model="quadratic",
                  exclusions={3: "panel scratched before measurement"})
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        assert fits.snapshot_intact(fit)
        results = fits.results_of(fit)
        # The document holds a summary naming the per-run table's hash; the table is beside it.
        block = s.get(FitRuns, fit_id)
        assert results["runs"]["sha256"] == hashlib.sha256(block.data).hexdigest()
        assert results["runs"]["n"] == 20 and results["runs"]["excluded"] == 1
        excluded = [r["row"] for r in fits.runs_of(fit).records() if r["excluded"]]
        assert excluded == [3]
        event = s.scalar(select(AuditEvent).where(AuditEvent.action == "fit.create"))
        assert fit.snapshot_sha256 in event.new_json
        assert "panel scratched" in event.new_json


def test_altered_results_break_the_snapshot_hash(db, version):
    fit_id = _fit(db, version, response="Hardness", model="linear")
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, fit_id).results_json)
        doc["fit"]["r_squared"] = 0.999
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": json.dumps(doc), "i": fit_id})
    with db.session() as s:
        assert not fits.snapshot_intact(s.get(Fit, fit_id))


def test_altered_per_run_table_breaks_the_snapshot(db, version):
    fit_id = _fit(db, version, response="Hardness", model="linear")
    with db.transaction() as s:
        data = bytearray(s.get(FitRuns, fit_id).data)
        data[-3] ^= 0x01  # one bit of the last run's DFFITS
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fit_runs SET data = :d WHERE fit_id = :i"),
                  {"d": bytes(data), "i": fit_id})
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        assert not fits.snapshot_intact(fit)
        assert "does not hash" in fits.runs_problem(fit)
        assert (f"fit {fit_id}: its per-run table does not hash to the SHA-256 its snapshot "
                "holds (altered)") in [d.describe().split(" (event")[0]
                                       for d in replay.disagreements(s)]


def test_a_deleted_per_run_table_is_named_by_the_replay(db, version):
    fit_id = _fit(db, version, response="Hardness", model="linear")
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(text("DELETE FROM fit_runs WHERE fit_id = :i"), {"i": fit_id})
    with db.session() as s:
        found = [d.describe() for d in replay.fit_disagreements(s, s.get(Fit, fit_id))]
    assert any(f"fit {fit_id}: its per-run table is missing (deleted)" in d for d in found)


def test_the_database_refuses_to_change_or_delete_a_per_run_table(db, version):
    fit_id = _fit(db, version, response="Hardness", model="linear")
    for statement in ("UPDATE fit_runs SET sha256 = 'x' WHERE fit_id = :i",
                      "DELETE FROM fit_runs WHERE fit_id = :i"):
        with pytest.raises(DBAPIError, match="fit run tables are immutable"):
            with db.transaction() as s:
                s.execute(text(statement), {"i": fit_id})


def test_running_again_makes_a_new_fit(db, version):
    first = _fit(db, version, response="Hardness", model="linear")
    second = _fit(db, version, response="Hardness", model="quadratic")
    assert first != second
    with db.session() as s:
        assert s.get(Fit, first).results_json != s.get(Fit, second).results_json


@pytest.mark.parametrize("choices, field", [
    ({"response": "Nope", "model": "linear"}, "response"),
    ({"response": "Hardness", "model": "linear", "exclusions": {2: "  "}}, "exclusions"),
    ({"response": "Hardness", "model": "linear", "exclusions": {99: "typo"}}, "exclusions"),
    ({"response": "Hardness", "model": "cubic"}, "spec"),
])
def test_bad_fit_requests_name_the_field(db, version, choices, field):
    with pytest.raises(WorkflowError) as info:
        _fit(db, version, **choices)
    assert info.value.field == field
    with db.session() as s:
        assert s.scalar(select(Fit.id)) is None
