"""One signing module for fit sign-off, withdrawal and setpoint release (app.workflow.signing):
separation of duties, audited refusals of every cause, the lockout after consecutive wrong
passwords, and the password check made before the write transaction opens."""

from __future__ import annotations

import json
from datetime import timedelta

import pytest
from sqlalchemy import select

from app.store import audit
from app.store.db import Database
from app.store.models import AuditEvent, Fit, SetpointProposal
from app.workflow import Conflict, Forbidden, accounts, fits, reviews, setpoints, signing
from tests.conftest import PASSWORD
from tests.workflow import helpers as h

WRONG = "not the password"  # noqa: S105  (a deliberately wrong test password)


def _add_user(db, username, roles, full_name=None):
    with db.transaction() as s:
        accounts.create_user(s, None, username=username, roles=roles, password=PASSWORD,
                             full_name=full_name or username.title() + " Both")


def _events(db, action):
    with db.session() as s:
        return [(e, json.loads(e.new_json or "null")) for e in s.scalars(
            select(AuditEvent).where(AuditEvent.action == action).order_by(AuditEvent.seq))]


def _state(db, model, object_id):
    with db.session() as s:
        return s.get(model, object_id).state


def _counter(db, username):
    with db.session() as s:
        user = h.user(s, username)
        return user.reauth_failures, user.reauth_locked_until


def _submitted(db, *, uploader="erin", author="erin", submitter="erin"):
    study_id = h.make_study(db)
    for engineer in {uploader, author, submitter} - {"erin"}:
        h.join(db, study_id, engineer)  # a second engineer on erin's team
    fit_id = h.make_fit(db, h.add_version(db, study_id, who=uploader), author=author,
                        model="linear")
    h.submit(db, fit_id, who=submitter)
    return fit_id


def _propose(db, fit_id, who="erin"):
    with db.transaction() as s:
        return setpoints.propose(s, h.user(s, who), [fits.get_fit(s, fit_id)],
                                 {"Hardness": {"goal": "maximize"}}, None, None).id


def _release(db, proposal_id, who="abel", password=PASSWORD):
    def act(s, actor, proof):
        return setpoints.release(s, actor, setpoints.get_proposal(s, proposal_id),
                                 proof=proof).id

    return h.signed(db, who, password, setpoints.attempt(proposal_id), act)


# ---- separation of duties ----------------------------------------------------------------

def test_approving_a_fit_on_data_you_uploaded_is_refused_and_audited(db, users):
    # Seen: a user with engineer and approver roles approved a fit on data they had uploaded.
    _add_user(db, "una", "engineer,approver")
    fit_id = _submitted(db, uploader="una")
    with pytest.raises(signing.DutiesConflict, match="uploaded data version 1") as info:
        h.sign(db, fit_id, who="una")
    assert info.value.status == 403 and info.value.field == "signer"
    assert _state(db, Fit, fit_id) == "submitted"
    ((event, new),) = _events(db, "signature.refused")
    assert event.object_type == "fit" and event.object_id == str(fit_id)
    assert event.study_id is not None and "(una)" in event.actor_name
    assert new["cause"] == signing.DUTIES and new["attempted"] == "sign"
    assert _counter(db, "una")[0] == 0  # not a password failure
    h.sign(db, fit_id, who="abel")
    assert _state(db, Fit, fit_id) == "approved"


def test_releasing_setpoints_from_your_own_fit_is_refused_and_audited(db, users):
    # Seen: a user released setpoints derived from their own fit.
    _add_user(db, "bea", "engineer,approver")
    fit_id = _submitted(db, author="bea")
    h.sign(db, fit_id, who="abel")
    pid = _propose(db, fit_id, who="erin")
    with pytest.raises(signing.DutiesConflict, match=f"You made fit {fit_id}"):
        _release(db, pid, who="bea")
    assert _state(db, SetpointProposal, pid) == "draft"
    ((event, new),) = _events(db, "signature.refused")
    assert (event.object_type, event.object_id) == ("setpoint", str(pid))
    assert new["cause"] == signing.DUTIES and new["attempted"] == "release"
    _release(db, pid, who="ada")
    assert _state(db, SetpointProposal, pid) == "released"


def test_releasing_your_own_proposal_is_refused_and_audited(db, users):
    _add_user(db, "bea", "engineer,approver")
    study_id, _version, fit_id = h.approved_fit(db)
    h.join(db, study_id, "bea")
    pid = _propose(db, fit_id, who="bea")
    with pytest.raises(signing.DutiesConflict, match="You proposed these setpoints"):
        _release(db, pid, who="bea")
    ((_event, new),) = _events(db, "signature.refused")
    assert new["cause"] == signing.DUTIES


def test_nobody_changes_their_own_roles(db, users):
    # Seen: an admin granted themself the approver role and signed.
    _add_user(db, "rex", "admin", full_name="Rex Second-Admin")
    with db.transaction() as s, pytest.raises(signing.DutiesConflict, match="own roles"):
        accounts.set_roles(s, h.user(s, "root"), "root", "admin,engineer")
    with db.session() as s:
        assert h.user(s, "root").roles == "admin"
    with db.transaction() as s:
        accounts.set_roles(s, h.user(s, "rex"), "root", "admin,engineer")
    with db.session() as s:
        assert h.user(s, "root").role_set == {"admin", "engineer"}


@pytest.mark.parametrize("how", ["create", "set_roles"])
def test_admin_never_goes_with_approver(db, users, how):
    with db.transaction() as s, pytest.raises(signing.DutiesConflict, match="admin and the "
                                                                             "approver") as info:
        if how == "create":
            accounts.create_user(s, None, username="max", full_name="Max Both",
                                 roles="admin,approver", password=PASSWORD)
        else:
            accounts.set_roles(s, None, "abel", "approver,admin")
    assert info.value.field == "roles"
    with db.session() as s:
        assert h.user(s, "max") is None and h.user(s, "abel").roles == "approver"


def test_printed_names_are_unique_among_active_users(db, users):
    # Seen: two active accounts carried the same printed name.
    with db.transaction() as s, pytest.raises(Conflict, match="'abel' already has") as info:
        accounts.create_user(s, None, username="abel2", full_name="  abel   APPROVER ",
                             roles="approver", password=PASSWORD)
    assert info.value.field == "full_name"
    with db.transaction() as s, pytest.raises(Conflict):
        accounts.set_full_name(s, None, "ada", "Abel Approver")
    with db.transaction() as s:
        accounts.set_active(s, h.user(s, "root"), "abel", False)
        accounts.create_user(s, None, username="abel2", full_name="Abel Approver",
                             roles="approver", password=PASSWORD)
    with db.transaction() as s, pytest.raises(Conflict, match="'abel2' already has"):
        accounts.set_active(s, h.user(s, "root"), "abel", True)
    with db.transaction() as s:
        accounts.set_full_name(s, None, "ada", "Ada Second-Approver (QA)")
    (_event, new), = _events(db, "user.set_full_name")
    assert new == {"full_name": "Ada Second-Approver (QA)"}


# ---- refusals of every cause are on the record ----------------------------------------------

def test_wrong_state_and_stale_snapshot_refusals_are_audited(db, users):
    fit_id = _submitted(db)
    with pytest.raises(Conflict):
        h.sign(db, fit_id, expected_row_version=1)
    h.sign(db, fit_id)
    with pytest.raises(Conflict):
        h.sign(db, fit_id, who="ada")
    causes = [new["cause"] for _e, new in _events(db, "signature.refused")]
    assert causes == [signing.STALE, signing.WRONG_STATE]


# ---- lockout -------------------------------------------------------------------------------

def test_five_wrong_passwords_lock_signing_until_an_admin_unlocks(db, users):
    # Seen: 30 wrong signing passwords were all answered 403, then the right one signed.
    fit_id = _submitted(db)
    for attempt in range(1, 6):
        with pytest.raises(signing.SignatureRefused) as info:
            h.sign(db, fit_id, password=WRONG)
        assert type(info.value) is signing.SignatureRefused, attempt
    failures, until = _counter(db, "abel")
    assert failures == 0 and until is not None  # locked; the count starts again
    with pytest.raises(signing.ReauthLocked, match="locked") as info:
        h.sign(db, fit_id, password=PASSWORD)
    assert info.value.status == 403
    assert _state(db, Fit, fit_id) == "submitted"
    refused = [new for _e, new in _events(db, "signature.refused")]
    assert [r["cause"] for r in refused] == [signing.WRONG_PASSWORD] * 5 + [signing.LOCKED]
    assert [r.get("consecutive_failures") for r in refused[:5]] == [1, 2, 3, 4, 5]
    ((lock, new),) = _events(db, "user.reauth_locked")
    assert "(abel)" in lock.actor_name and lock.object_type == "user"
    assert new["consecutive_failures"] == 5
    # The other approver is not affected.
    h.sign(db, fit_id, who="ada")
    other = _submitted(db)
    with db.transaction() as s:
        accounts.unlock(s, h.user(s, "root"), "abel")
    ((unlock, _new),) = _events(db, "user.unlock")
    assert json.loads(unlock.old_json)["locked_until"] is not None
    h.sign(db, other)
    assert _state(db, Fit, other) == "approved"
    with db.session() as s:
        assert audit.verify(s).ok


def test_the_lock_ends_by_itself(db, users):
    fit_id = _submitted(db)
    limits = signing.Lockout(failures=2, minutes=15)

    def act(s, actor, proof):
        return None

    for _ in range(2):
        with pytest.raises(signing.SignatureRefused):
            h.signed(db, "abel", WRONG, signing.Attempt("sign", "fit", fit_id), act, limits)
    with db.session(write=False) as s:
        user = h.user(s, "abel")
        until = signing.locked_until(user)
        assert until is not None
        with pytest.raises(signing.ReauthLocked):
            signing.reauthenticate(s, user, PASSWORD)
        after = until + timedelta(seconds=1)
        assert signing.locked_until(user, after) is None
        proof = signing.reauthenticate(s, user, PASSWORD, now=after)
    assert proof.user_id == user.id


def test_a_success_resets_the_count(db, users):
    first, second = _submitted(db), _submitted(db)
    for _ in range(4):
        with pytest.raises(signing.SignatureRefused):
            h.sign(db, first, password=WRONG)
    assert _counter(db, "abel") == (4, None)
    h.sign(db, first)
    assert _counter(db, "abel") == (0, None)
    for _ in range(4):
        with pytest.raises(signing.SignatureRefused):
            h.sign(db, second, password=WRONG)
    h.sign(db, second)  # 4 + 4 wrong, but never 5 in a row
    assert _state(db, Fit, second) == "approved"
    assert _events(db, "user.reauth_locked") == []


def test_a_right_password_ends_the_run_even_when_the_step_is_refused(db, users):
    fit_id = _submitted(db)
    for _ in range(4):
        with pytest.raises(signing.SignatureRefused):
            h.sign(db, fit_id, password=WRONG)
    with pytest.raises(Conflict):
        h.sign(db, fit_id, expected_row_version=1)  # right password, stale version
    assert _counter(db, "abel") == (0, None)
    with pytest.raises(signing.SignatureRefused):
        h.sign(db, fit_id, password=WRONG)
    assert _counter(db, "abel") == (1, None)


def test_a_proof_belongs_to_one_user_and_one_password(db, users):
    fit_id = _submitted(db)
    with db.session(write=False) as s:
        proof = signing.reauthenticate(s, h.user(s, "ada"), PASSWORD)
    with db.transaction() as s, pytest.raises(signing.ProofRejected):
        reviews.sign(s, h.user(s, "abel"), fits.get_fit(s, fit_id), meaning=reviews.APPROVE,
                     proof=proof)
    with db.transaction() as s, pytest.raises(signing.ProofRejected):
        reviews.sign(s, h.user(s, "abel"), fits.get_fit(s, fit_id), meaning=reviews.APPROVE,
                     proof=None)
    assert _state(db, Fit, fit_id) == "submitted"


# ---- the password is checked before the write transaction opens -------------------------------

def test_a_concurrent_writer_is_not_held_while_a_signing_password_is_checked(
        db, users, backend, monkeypatch):
    # Seen: the signing password was verified inside the write transaction; SQLite has one
    # writer, so every wrong signature held other users' writes for the argon2 time.
    if backend != "sqlite":
        pytest.skip("SQLite's single writer is what a check inside the write would hold")
    fit_id = _submitted(db)
    # Another writer that waits at most 0.2 s for the lock instead of the usual 15 s.
    other = Database(db.url, busy_timeout_ms=200, keys=db.keys)
    outcomes = []
    real_verify = signing.verify_password

    def verify_while_someone_writes(password_hash, password):
        try:
            with other.transaction() as s:
                audit.record(s, actor=None, action="test.concurrent_write", object_type="test")
            outcomes.append("written")
        except Exception as exc:  # "database is locked" if the signer holds the write lock
            outcomes.append(f"blocked: {exc}")
        return real_verify(password_hash, password)

    monkeypatch.setattr(signing, "verify_password", verify_while_someone_writes)
    try:
        with pytest.raises(signing.SignatureRefused):
            h.sign(db, fit_id, password=WRONG)
        h.sign(db, fit_id)
    finally:
        other.dispose()
    assert outcomes == ["written", "written"]
    assert _state(db, Fit, fit_id) == "approved"


def test_password_change_needs_the_same_unlocked_account(db, users):
    """Account-page password change shares the counter: locked by signing, refused too."""
    fit_id = _submitted(db)
    for _ in range(5):
        with pytest.raises(signing.SignatureRefused):
            h.sign(db, fit_id, password=WRONG)
    attempt = signing.Attempt("change password", "user", 0,
                              action="user.password_change_refused")

    def change(s, actor, proof):
        return accounts.change_own_password(s, actor, proof, new_hash)

    new_hash = accounts.new_password_hash("a brand new passphrase", username="abel")

    with pytest.raises(signing.ReauthLocked):
        h.signed(db, "abel", PASSWORD, attempt, change)
    ((_event, new),) = _events(db, "user.password_change_refused")
    assert new["cause"] == signing.LOCKED
    with db.transaction() as s:
        accounts.unlock(s, None, "abel")
    h.signed(db, "abel", PASSWORD, attempt, change)
    with db.session() as s:
        assert h.user(s, "abel").password_changed_at is not None
    with pytest.raises(Forbidden):
        h.sign(db, fit_id, password=PASSWORD)  # the old password is gone
