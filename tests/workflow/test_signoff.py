"""Sign-off rules (DESIGN.md "Sign-off rules"): states, who may sign, order, signature linking."""

from __future__ import annotations

import hashlib
import json

import pytest
from sqlalchemy import select, text

from app.store import audit
from app.store.audit import canonical_json
from app.store.models import AuditEvent, Fit, Signature
from app.workflow import Conflict, Forbidden, WorkflowError, accounts, reviews
from app.workflow.fits import snapshot_document
from tests.conftest import PASSWORD
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h


@pytest.fixture
def draft(db, users):
    study_id = h.make_study(db)
    version_id = h.add_version(db, study_id)
    return h.make_fit(db, version_id, exclusions={3: "panel scratched before measurement"})


def _fit(db, fit_id):
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        return fit.state, fit.row_version


def _events(db, action):
    with db.session() as s:
        return list(s.scalars(select(AuditEvent).where(AuditEvent.action == action)
                              .order_by(AuditEvent.seq)))


def _add_user(db, username, roles):
    with db.transaction() as s:
        accounts.create_user(s, None, username=username, full_name=username.title() + " Both",
                             roles=roles, password=PASSWORD)


def test_submit_then_approve_records_states_and_signature(db, draft):
    h.submit(db, draft)
    assert _fit(db, draft) == ("submitted", 2)
    sig_id = h.sign(db, draft, comment="Residuals look fine; run-order drift noted.")
    assert _fit(db, draft) == ("approved", 3)
    (submitted,) = _events(db, "fit.submit")
    assert json.loads(submitted.old_json)["state"] == "draft"
    assert json.loads(submitted.new_json)["state"] == "submitted"
    (approved,) = _events(db, "fit.approve")
    assert json.loads(approved.old_json) == {"state": "submitted", "row_version": 2}
    new = json.loads(approved.new_json)
    assert new["state"] == "approved"
    with db.session() as s:
        sig = s.get(Signature, sig_id)
        fit = s.get(Fit, draft)
        assert sig.signer.username == "abel" and sig.printed_name == "Abel Approver"
        assert sig.meaning == reviews.APPROVE and sig.signed_at.tzinfo is not None
        assert new["signature"]["manifest_sha256"] == sig.manifest_sha256
        assert reviews.signature_status(fit, sig) == reviews.VALID
        assert fit.submitted_by.username == "erin" and fit.submitted_at is not None
    with db.session() as s:
        assert audit.verify(s).ok


def test_return_needs_a_comment_and_a_returned_fit_stays_returned(db, draft):
    h.submit(db, draft)
    with pytest.raises(WorkflowError) as info:
        h.sign(db, draft, meaning=reviews.RETURN, comment="  ")
    assert info.value.field == "comment"
    h.sign(db, draft, meaning=reviews.RETURN, comment="Exclude nothing without a lab note.")
    assert _fit(db, draft)[0] == "returned"
    with pytest.raises(Conflict, match="make a new fit") as info:
        h.submit(db, draft)
    assert info.value.status == 409
    assert len(_events(db, "fit.return")) == 1


def test_unknown_meaning_is_refused_naming_the_field(db, draft):
    h.submit(db, draft)
    with pytest.raises(WorkflowError) as info:
        h.sign(db, draft, meaning="looks ok")
    assert info.value.field == "meaning"
    assert _fit(db, draft)[0] == "submitted"


def test_author_never_approves_own_fit(db, users):
    _add_user(db, "bo", "engineer,approver")
    study_id = h.make_study(db)
    h.join(db, study_id, "bo")
    fit_id = h.make_fit(db, h.add_version(db, study_id), author="bo")
    h.submit(db, fit_id)  # submitted by erin, made by bo
    with pytest.raises(Forbidden, match="made or submitted") as info:
        h.sign(db, fit_id, who="bo")
    assert info.value.status == 403
    assert _fit(db, fit_id)[0] == "submitted"


def test_submitter_never_approves_the_fit_they_submitted(db, draft):
    _add_user(db, "sam", "engineer,approver")
    h.join(db, 1, "sam")  # the draft's study, made by erin
    h.submit(db, draft, who="sam")
    with pytest.raises(Forbidden):
        h.sign(db, draft, who="sam")
    h.sign(db, draft, who="ada")
    assert _fit(db, draft)[0] == "approved"


@pytest.mark.parametrize("step, who", [("submit", "abel"), ("submit", "otto"),
                                       ("sign", "erin"), ("sign", "otto"), ("sign", "root")])
def test_roles_are_enforced_by_the_service(db, draft, step, who):
    if step == "sign":
        h.submit(db, draft)
    with pytest.raises(Forbidden) as info:
        (h.submit if step == "submit" else h.sign)(db, draft, who)
    assert info.value.field == "role"


def test_wrong_password_is_refused_and_recorded(db, draft):
    h.submit(db, draft)
    with pytest.raises(reviews.SignatureRefused) as info:
        h.sign(db, draft, password="not the password")
    assert info.value.status == 403 and info.value.field == "password"
    assert _fit(db, draft) == ("submitted", 2)
    # The signing transaction rolled back; the refusal was written in its own transaction.
    (event,) = _events(db, "signature.refused")
    assert event.object_id == str(draft) and event.study_id is not None
    with db.session() as s:
        assert s.scalar(select(Signature.id)) is None


def test_steps_out_of_order_are_conflicts(db, draft):
    with pytest.raises(Conflict, match="must be submitted"):
        h.sign(db, draft)
    with pytest.raises(Conflict, match="must be approved"):
        h.withdraw(db, draft, who="abel", reason="no")
    h.submit(db, draft)
    with pytest.raises(Conflict, match="must be draft"):
        h.submit(db, draft)
    h.sign(db, draft)
    with pytest.raises(Conflict):
        h.sign(db, draft, who="ada")
    assert len(_events(db, "fit.approve")) == 1


def test_stale_row_version_is_a_conflict(db, draft):
    h.submit(db, draft)  # row_version 1 -> 2
    with pytest.raises(Conflict) as info:
        h.sign(db, draft, expected_row_version=1)
    assert info.value.field == "row_version"
    h.sign(db, draft, expected_row_version=2)


def test_signature_covers_exactly_its_snapshot_hash(db, draft):
    h.submit(db, draft)
    sig_id = h.sign(db, draft)
    with db.session() as s:
        fit, sig = s.get(Fit, draft), s.get(Signature, sig_id)
        document = canonical_json(snapshot_document(fit)).encode()
        assert sig.snapshot_sha256 == hashlib.sha256(document).hexdigest() == fit.snapshot_sha256
        fields = reviews.manifest_document(sig)
        assert set(fields) == {"fit_id", "signer_id", "printed_name", "signed_at", "meaning",
                               "comment", "snapshot_sha256"}
        assert sig.manifest_sha256 == hashlib.sha256(canonical_json(fields).encode()).hexdigest()


def test_altered_results_make_the_signature_invalid(db, draft):
    h.submit(db, draft)
    sig_id = h.sign(db, draft)
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, draft).results_json)
        doc["coefficients"][1]["estimate"] += 1e-6
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": canonical_json(doc), "i": draft})
    with db.session() as s:
        check = reviews.check_signature(s.get(Fit, draft), s.get(Signature, sig_id))
    assert check.status == reviews.INVALID and "no longer matches" in check.reason


def test_altered_signature_record_is_invalid(db, draft):
    h.submit(db, draft)
    sig_id = h.sign(db, draft)
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE signatures SET meaning = :m WHERE id = :i"),
                  {"m": "returned for rework", "i": sig_id})
    with db.session() as s:
        check = reviews.check_signature(s.get(Fit, draft), s.get(Signature, sig_id))
    assert check.status == reviews.INVALID and "altered" in check.reason


def test_signature_moved_to_another_fit_is_invalid(db, draft):
    h.submit(db, draft)
    sig_id = h.sign(db, draft)
    with db.session() as s:
        version_id = s.get(Fit, draft).data_version_id
    other = h.make_fit(db, version_id, model="linear")
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE signatures SET fit_id = :f WHERE id = :i"),
                  {"f": other, "i": sig_id})
    with db.session() as s:
        assert reviews.signature_status(s.get(Fit, other), s.get(Signature, sig_id)) == "invalid"


def test_new_data_version_shows_the_approval_as_not_applying(db, users):
    study_id, _version, fit_id = h.approved_fit(db)
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        assert reviews.signatures_json(fit)[0]["status"] == reviews.VALID
    h.add_version(db, study_id, reason="Row 7 hardness re-measured after gauge calibration")
    with db.session() as s:
        fit = s.get(Fit, fit_id)
        (item,) = reviews.signatures_json(fit)
    assert item["status"] == reviews.NOT_APPLYING and "data version 2" in item["status_reason"]
    assert item["printed_name"] == "Abel Approver" and item["meaning"] == reviews.APPROVE


def test_fit_of_an_older_data_version_cannot_be_submitted_or_signed(db, users):
    study_id = h.make_study(db)
    old_fit = h.make_fit(db, h.add_version(db, study_id))
    h.submit(db, old_fit)
    h.add_version(db, study_id, reason="corrected row 4")
    with pytest.raises(Conflict) as info:
        h.sign(db, old_fit)
    assert info.value.field == "data_version"


def test_new_approval_supersedes_the_previous_one_for_the_same_response(db, users):
    study_id, version_id, first = h.approved_fit(db)
    gloss = h.make_fit(db, version_id, response="Gloss", model="linear")
    h.submit(db, gloss)
    h.sign(db, gloss)
    second = h.make_fit(db, version_id, model="interaction")
    h.submit(db, second)
    h.sign(db, second, who="ada")
    assert _fit(db, first)[0] == "superseded"
    assert _fit(db, second)[0] == "approved"
    assert _fit(db, gloss)[0] == "approved"  # another response is not touched
    (event,) = _events(db, "fit.supersede")
    assert event.object_id == str(first)
    assert json.loads(event.new_json) == {"state": "superseded", "row_version": 4,
                                          "superseded_by_fit": second}
    with db.session() as s:
        fit = s.get(Fit, first)
        assert reviews.signatures_json(fit)[0]["status"] == reviews.VALID
        assert reviews.previous_approved(s, s.get(Fit, second)).id == first
        assert reviews.previous_approved(s, fit) is None


def test_withdraw_is_signed_with_a_reason(db, users):
    _study, _version, fit_id = h.approved_fit(db)
    with pytest.raises(WorkflowError) as info:
        h.withdraw(db, fit_id, reason="")
    assert info.value.field == "reason"
    with pytest.raises(reviews.SignatureRefused):
        h.withdraw(db, fit_id, password="wrong")
    sig_id = h.withdraw(db, fit_id)
    with db.session() as s:
        sig = s.get(Signature, sig_id)
        assert sig.meaning == reviews.WITHDRAW and sig.comment == "Catalyst lot recalled"
    assert _fit(db, fit_id)[0] == "withdrawn"
    (event,) = _events(db, "fit.withdraw")
    assert event.reason == "Catalyst lot recalled"
    assert json.loads(event.old_json)["state"] == "approved"
