"""The database writer's forgeries: caught and named, on SQLite and PostgreSQL.

Each scenario plays someone who can write the database but does not hold the integrity key
(tests/store/forger.py): drop the triggers, edit rows, recompute the plain SHA-256 hashes with
the project's own functions, re-hash the chain after the edit (keeping the old seals or removing
them), create the triggers again. ``plumbline audit verify`` (the chain with its seals, and the
replay of the trail against the tables) must fail and name the object every time.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from click.testing import CliRunner
from sqlalchemy import select, text

from app.store import audit
from app.store.anchor import ANCHOR_FILE, check_anchors
from app.store.models import ConfirmationRun, DataVersion, Fit, SetpointProposal, Signature
from app.workflow import fits, reviews, setpoints
from app.workflow.replay import disagreements
from app.workflow.signing import manifest_sha256
from app.workflow.uploads import sha256_bytes
from tests.store import forger
from tests.store.forger import DROP, KEEP
from tests.workflow import helpers as h
from tests.workflow.test_setpoints import _pi, confirm, propose, release


@pytest.fixture
def record(db, users) -> dict[str, int]:
    """An approved fit with a released setpoint proposal and a confirmation run, a returned fit
    and a submitted fit, all of one study."""
    study_id, version_id, approved = h.approved_fit(db)
    returned = h.make_fit(db, version_id, model="linear")
    h.submit(db, returned)
    h.sign(db, returned, meaning=reviews.RETURN, comment="Add the square terms.")
    submitted = h.make_fit(db, version_id, model="interaction")
    h.submit(db, submitted)
    proposal = propose(db, [approved])
    release(db, proposal, comment="For the confirmation runs.")
    low, high = _pi(db, proposal)["Hardness"]
    run = confirm(db, proposal, f"Run,Hardness\nC1,{high + 1.0:.3f}\n".encode())
    with db.session() as s:
        def sig(**where):
            return s.scalar(select(Signature.id).filter_by(**where))
        ids = {"study": study_id, "version": version_id, "approved": approved,
               "returned": returned, "submitted": submitted, "proposal": proposal, "run": run,
               "approved_sig": sig(fit_id=approved), "returned_sig": sig(fit_id=returned),
               "release_sig": sig(setpoint_id=proposal)}
    assert findings(db) == [], "the untouched record verifies"
    return ids


def findings(db) -> list[str]:
    """What `plumbline audit verify` reports as broken: the chain, then the replay."""
    with db.session(write=False) as s:
        chain = audit.verify(s)
        found = [d.describe() for d in disagreements(s)]
    return ([] if chain.ok else [chain.describe()]) + found


def names(found: list[str], obj: str) -> bool:
    pattern = re.compile(rf"\b{re.escape(obj)}\b")
    return any(pattern.search(line) for line in found)


# ---- the forgeries -----------------------------------------------------------------------------

def returned_made_approved(s, r, seals):
    """A returned fit becomes approved: its state, its signature's meaning (manifest
    recomputed) and its event, re-hashed."""
    s.execute(text("UPDATE fits SET state = 'approved' WHERE id = :i"), {"i": r["returned"]})
    sig = s.get(Signature, r["returned_sig"])
    sig.meaning, sig.comment = reviews.APPROVE, ""
    sig.manifest_sha256 = manifest_sha256(sig)
    s.flush()
    seq = forger.seq_of(s, "fit.return", r["returned"])
    new = forger.new_of(s, seq)
    new["state"] = "approved"
    new["signature"].update(meaning=reviews.APPROVE, comment="",
                            manifest_sha256=sig.manifest_sha256)
    forger.edit_event(s, seq, action="fit.approve", new=new, reason=None)
    forger.rehash_from(s, seq, seals)
    return [f"fit {r['returned']}", f"signature {r['returned_sig']}"]


def results_edited(s, r, seals):
    """A signed fit's results are edited; its snapshot hash, its signature's manifest and the
    events naming them are recomputed."""
    fit = s.get(Fit, r["approved"])
    old = fit.snapshot_sha256
    before = fit.results_json
    fit.results_json = before.replace('"f_value":', '"f_value":1', 1)  # F 59.2 becomes 159.2
    assert fit.results_json != before
    fit.snapshot_sha256 = fits.snapshot_sha256(fit)
    sig = s.get(Signature, r["approved_sig"])
    sig.snapshot_sha256 = fit.snapshot_sha256
    sig.manifest_sha256 = manifest_sha256(sig)
    s.flush()
    first = None
    for action in ("fit.create", "fit.submit", "fit.approve"):
        seq = forger.seq_of(s, action, fit.id)
        new = forger.new_of(s, seq)
        if "snapshot_sha256" in new:
            new["snapshot_sha256"] = fit.snapshot_sha256
        if "signature" in new:
            new["signature"].update(snapshot_sha256=fit.snapshot_sha256,
                                    manifest_sha256=sig.manifest_sha256)
        forger.edit_event(s, seq, new=new)
        first = seq if first is None else min(first, seq)
    assert fit.snapshot_sha256 != old
    forger.rehash_from(s, first, seals)
    return [f"fit {r['approved']}", f"signature {r['approved_sig']}"]


def results_edited_rows_only(s, r, seals):
    """The same edit, leaving the trail alone."""
    fit = s.get(Fit, r["approved"])
    fit.results_json = fit.results_json.replace('"f_value":', '"f_value":1', 1)
    fit.snapshot_sha256 = fits.snapshot_sha256(fit)
    sig = s.get(Signature, r["approved_sig"])
    sig.snapshot_sha256 = fit.snapshot_sha256
    sig.manifest_sha256 = manifest_sha256(sig)
    s.flush()
    return [f"fit {r['approved']}", f"signature {r['approved_sig']}"]


def signature_deleted(s, r, seals):
    """The approval's signature row is deleted; the fit stays approved."""
    s.execute(text("DELETE FROM signatures WHERE id = :i"), {"i": r["approved_sig"]})
    return [f"signature {r['approved_sig']}"]


def signature_deleted_with_its_event_edited(s, r, seals):
    """The signature is deleted and taken out of its event, re-hashed."""
    s.execute(text("DELETE FROM signatures WHERE id = :i"), {"i": r["approved_sig"]})
    seq = forger.seq_of(s, "fit.approve", r["approved"])
    new = forger.new_of(s, seq)
    del new["signature"]
    forger.edit_event(s, seq, new=new)
    forger.rehash_from(s, seq, seals)
    return [f"fit {r['approved']}"]


def state_moved_without_signature(s, r, seals):
    """A submitted fit is set to approved with no signature and no event."""
    s.execute(text("UPDATE fits SET state = 'approved', row_version = row_version + 1 "
                   "WHERE id = :i"), {"i": r["submitted"]})
    return [f"fit {r['submitted']}"]


def state_moved_with_a_forged_event(s, r, seals):
    """…and with an approval event appended to the chain (plain hash, no seal)."""
    s.execute(text("UPDATE fits SET state = 'approved', row_version = row_version + 1 "
                   "WHERE id = :i"), {"i": r["submitted"]})
    forger.append_event(s, action="fit.approve", object_type="fit",
                        object_id=str(r["submitted"]), study_id=r["study"],
                        new={"state": "approved", "row_version": 3})
    return [f"fit {r['submitted']}"]


def forged_signature_with_a_borrowed_seal(s, r, seals):
    """A new approval signature row for the submitted fit, carrying another signature's key id
    and seal, with its state moved and an event appended."""
    donor = s.get(Signature, r["approved_sig"])
    fit = s.get(Fit, r["submitted"])
    sig = Signature(fit_id=fit.id, signer_id=donor.signer_id, printed_name=donor.printed_name,
                    signed_at=donor.signed_at, meaning=reviews.APPROVE, comment="",
                    snapshot_sha256=fit.snapshot_sha256, manifest_sha256="",
                    key_id=donor.key_id, seal=donor.seal)
    sig.manifest_sha256 = manifest_sha256(sig)
    s.add(sig)
    s.flush()
    s.execute(text("UPDATE fits SET state = 'approved' WHERE id = :i"), {"i": fit.id})
    return [f"signature {sig.id}", f"fit {fit.id}"]


def release_signature_altered(s, r, seals):
    """The setpoint release signature's printed name and comment change (manifest
    recomputed), and so does its event, re-hashed."""
    sig = s.get(Signature, r["release_sig"])
    sig.printed_name, sig.comment = "Someone Else", "Released without reservation."
    sig.manifest_sha256 = manifest_sha256(sig)
    s.flush()
    seq = forger.seq_of(s, "setpoint.release", r["proposal"])
    new = forger.new_of(s, seq)
    new["signature"].update(printed_name=sig.printed_name, comment=sig.comment,
                            manifest_sha256=sig.manifest_sha256)
    forger.edit_event(s, seq, new=new)
    forger.rehash_from(s, seq, seals)
    return [f"signature {r['release_sig']}", f"setpoint {r['proposal']}"]


def setpoint_state_moved(s, r, seals):
    """A released proposal is set back to draft (to be released again by someone else)."""
    s.execute(text("UPDATE setpoint_proposals SET state = 'draft' WHERE id = :i"),
              {"i": r["proposal"]})
    return [f"setpoint {r['proposal']}"]


def confirmation_verdict_edited(s, r, seals):
    """A failed confirmation run is made to pass, in the row and in its event."""
    run = s.get(ConfirmationRun, r["run"])
    assert '"verdict":"fail"' in run.results_json
    run.results_json = run.results_json.replace('"verdict":"fail"', '"verdict":"pass"')
    s.flush()
    seq = forger.seq_of(s, "setpoint.confirmation", r["proposal"])
    new = forger.new_of(s, seq)
    new["verdict"] = "pass"
    forger.edit_event(s, seq, new=new)
    forger.rehash_from(s, seq, seals)
    return [f"confirmation run {r['run']}"]


def data_version_rewritten(s, r, seals):
    """A data version's canonical table is edited and its SHA-256 recomputed."""
    version = s.get(DataVersion, r["version"])
    body = version.canonical_csv.replace(b",", b";", 1)
    s.execute(text("UPDATE data_versions SET canonical_csv = :b, canonical_sha256 = :h "
                   "WHERE id = :i"), {"b": body, "h": sha256_bytes(body), "i": version.id})
    return [f"data version {r['version']}"]


def every_seal_removed(s, r, seals):
    """Every seal removed and the whole chain re-hashed: an "unsealed" trail, then the
    returned fit approved inside it."""
    for table in ("fits", "signatures", "setpoint_proposals", "confirmation_runs"):
        s.execute(text(f"UPDATE {table} SET key_id = NULL, seal = NULL"))
    returned_made_approved(s, r, DROP)
    forger.rehash_from(s, 1, DROP)
    return ["no event carries a seal"]


SCENARIOS = [
    (returned_made_approved, KEEP), (returned_made_approved, DROP),
    (results_edited, KEEP), (results_edited, DROP), (results_edited_rows_only, KEEP),
    (signature_deleted, KEEP),
    (signature_deleted_with_its_event_edited, KEEP),
    (signature_deleted_with_its_event_edited, DROP),
    (state_moved_without_signature, KEEP), (state_moved_with_a_forged_event, DROP),
    (forged_signature_with_a_borrowed_seal, KEEP),
    (release_signature_altered, KEEP), (release_signature_altered, DROP),
    (setpoint_state_moved, KEEP),
    (confirmation_verdict_edited, KEEP), (confirmation_verdict_edited, DROP),
    (data_version_rewritten, KEEP),
    (every_seal_removed, DROP),
]


@pytest.mark.parametrize("forge, seals", SCENARIOS,
                         ids=[f"{f.__name__}-{'keep' if s == KEEP else 'drop'}"
                              for f, s in SCENARIOS])
def test_a_forgery_is_caught_and_named(db, record, forge, seals):
    with forger.triggers_off(db) as s:
        expected = forge(s, record, seals)
    found = findings(db)
    assert found, f"{forge.__name__} went unnoticed"
    missing = [obj for obj in expected if not names(found, obj)]
    assert not missing, f"{forge.__name__}: {missing} not named in {found}"


def test_the_triggers_are_back_after_the_forger(db, record):
    with forger.triggers_off(db) as s:
        before = {name for name, _t, _d in forger._triggers(s)}
    with db.session() as s:
        assert {name for name, _t, _d in forger._triggers(s)} >= before | {
            "audit_events_no_update", "signatures_no_update", "fits_snapshot_no_update",
            "confirmation_runs_no_update"}


def test_the_review_page_and_the_integrity_page_show_the_forged_approval(db, record, actions,
                                                                          client):
    with forger.triggers_off(db) as s:
        returned_made_approved(s, record, KEEP)
    with db.session() as s:
        fit = s.get(Fit, record["returned"])
        check = reviews.check_signature(fit, fit.signatures[0])
    assert check.status == reviews.INVALID, check
    actions.login("otto")
    page = client.get(f"/fits/{record['returned']}/review").get_data(as_text=True)
    assert "invalid" in page and "valid</span>" not in page.replace("invalid</span>", "")
    integrity = client.get("/history/integrity").get_data(as_text=True)
    assert "Something does not hold" in integrity
    assert f"signature {record['returned_sig']}" in integrity


def test_a_release_signature_forgery_shows_on_the_setpoint_check(db, record):
    with forger.triggers_off(db) as s:
        release_signature_altered(s, record, KEEP)
    with db.session() as s:
        proposal = s.get(SetpointProposal, record["proposal"])
        sig = setpoints.release_signatures(s, proposal)[0]
        assert setpoints.signature_check(s, proposal, sig).status == reviews.INVALID


def test_a_removed_tail_is_named_by_the_anchor_file(db, record, app):
    with db.session() as s:
        top = audit.chain_head(s)[0]
    with forger.triggers_off(db) as s:
        s.execute(text("DELETE FROM audit_events WHERE seq > :q"), {"q": top - 2})
        forger.rehash_from(s, top - 2, KEEP)  # moves the head back; the kept seals still hold
    with db.session() as s:
        assert audit.verify(s).ok  # the database alone cannot tell
        chain = dict(s.execute(select(audit.AuditEvent.seq, audit.AuditEvent.hash)).all())
    lines = (Path(app.instance_path) / ANCHOR_FILE).read_text().splitlines()
    report = check_anchors(lines, db.keys.ring(), chain)
    assert not report.ok and report.missing and max(report.missing) == top


def test_verify_on_the_command_line_names_the_forged_object(db, record, app, monkeypatch):
    from app.cli_audit import audit_group

    with forger.triggers_off(db) as s:
        state_moved_without_signature(s, record, KEEP)
    monkeypatch.setattr("app.cli._app", lambda: app)
    result = CliRunner().invoke(audit_group, ["verify"])
    assert result.exit_code == 1, result.output
    assert f"fit {record['submitted']}: it is 'approved' but the trail leaves it 'submitted'" \
        in result.output


@pytest.mark.parametrize("statement", [
    "UPDATE confirmation_runs SET results_json = '{}' WHERE id = :i",
    "UPDATE confirmation_runs SET seal = NULL WHERE id = :i",
    "DELETE FROM confirmation_runs WHERE id = :i",
])
def test_confirmation_runs_cannot_change_or_go(db, record, statement):
    from sqlalchemy.exc import DatabaseError

    with pytest.raises(DatabaseError, match="confirmation runs are append-only"), \
            db.transaction() as s:
        s.execute(text(statement), {"i": record["run"]})
    assert findings(db) == []
