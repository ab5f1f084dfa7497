"""Study teams through the services: who reads, who acts, who manages, and what is audited."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import func, select

from app.demo_data import rsm_study
from app.ingest import read_upload, validate
from app.store.models import AuditEvent, DataVersion, Fit, Study, StudyMember
from app.workflow import (
    Conflict,
    Forbidden,
    NotFound,
    WorkflowError,
    accounts,
    fits,
    studies,
    teams,
    uploads,
)
from tests.workflow import helpers as h


@pytest.fixture
def people(db, users):
    """erin owns study 1; mia is on its team; nina is an engineer who is not."""
    h.add_engineers(db, ("mia", "Mia Member"), ("nina", "Nina Outsider"))
    study_id = h.make_study(db)
    h.join(db, study_id, "mia")
    return study_id


def _events(db, action):
    with db.session() as s:
        return [(e, json.loads(e.new_json or e.old_json or "null")) for e in s.scalars(
            select(AuditEvent).where(AuditEvent.action == action).order_by(AuditEvent.seq))]


def _count(db, model) -> int:
    with db.session() as s:
        return s.scalar(select(func.count()).select_from(model))


def test_the_rule(db, people):
    with db.session() as s:
        study = s.get(Study, people)
        erin, mia, nina = (h.user(s, n) for n in ("erin", "mia", "nina"))
        abel, otto, root = (h.user(s, n) for n in ("abel", "otto", "root"))
        assert teams.is_owner(erin, study) and not teams.is_owner(mia, study)
        assert [teams.can_read(s, u, study) for u in (erin, mia, nina, abel, otto, root)] == [
            True, True, False, True, True, True]
        assert [teams.can_act(s, u, study) for u in (erin, mia, nina, abel, otto, root)] == [
            True, True, False, False, False, False]
        assert [teams.can_manage(u, study) for u in (erin, mia, nina, abel, root)] == [
            True, False, False, False, True]
        assert [teams.can_set_thresholds(u, study) for u in (erin, mia, root)] == [
            True, False, False]


def test_lookups_hide_an_unreadable_study_like_a_missing_one(db, people):
    version_id = h.add_version(db, people)
    fit_id = h.make_fit(db, version_id, model="linear")
    with db.session() as s:
        nina, mia = h.user(s, "nina"), h.user(s, "mia")
        for lookup, object_id, missing in ((teams.study_for, people, "No study"),
                                           (teams.version_for, version_id, "No data version"),
                                           (teams.fit_for, fit_id, "No fit")):
            with pytest.raises(NotFound) as hidden:
                lookup(s, nina, object_id)
            with pytest.raises(NotFound) as absent:
                lookup(s, nina, 999_999)
            assert hidden.value.message.startswith(missing)
            assert hidden.value.message.replace(str(object_id), "N") == \
                absent.value.message.replace("999999", "N")
            assert lookup(s, mia, object_id).id == object_id


def test_the_one_statement_read_check_agrees_with_the_lookups(db, people):
    """teams.may_read (asked on every page request) gives the lookups' answer for every user,
    kind of id, readable, unreadable and missing row."""
    version_id = h.add_version(db, people)
    fit_id = h.make_fit(db, version_id, model="linear")
    with db.session() as s:
        everyone = [h.user(s, n) for n in ("erin", "mia", "nina", "abel", "otto", "root")]
        seen = set()
        for kind, object_id in (("study_id", people), ("version_id", version_id),
                                ("fit_id", fit_id), ("study_id", 999_999),
                                ("fit_id", 999_999), ("version_id", 0),
                                ("proposal_id", 999_999)):
            for user in everyone:
                try:
                    teams.LOOKUPS[kind](s, user, object_id)
                    readable = True
                except NotFound:
                    readable = False
                assert teams.may_read(s, user, kind, object_id) is readable, (kind, user.username)
                seen.add(readable)
            assert not teams.may_read(s, None, kind, object_id)
        assert seen == {True, False}


def test_lists_show_only_readable_studies(db, people):
    h.make_study(db, title="Another of erin's")
    with db.transaction() as s:
        own = studies.create_study(s, h.user(s, "nina"), title="Nina's own").id
    with db.session() as s:
        assert [x.id for x in teams.readable_studies(s, h.user(s, "nina"))] == [own]
        assert [x.id for x in teams.readable_studies(s, h.user(s, "mia"))] == [people]
        assert len(teams.readable_studies(s, h.user(s, "erin"))) == 2
        for site_wide in ("abel", "otto", "root"):
            assert len(teams.readable_studies(s, h.user(s, site_wide))) == 3


def test_a_non_member_engineer_changes_nothing(db, people):
    """The reported findings: thresholds, a data version and a submission by an outsider."""
    version_id = h.add_version(db, people)
    draft = h.make_fit(db, version_id, model="linear")
    before = (_count(db, DataVersion), _count(db, Fit), _count(db, AuditEvent))
    demo = rsm_study()
    raw = read_upload(demo.csv_bytes, demo.filename)
    with pytest.raises(NotFound):
        with db.transaction() as s:
            studies.set_thresholds(s, h.user(s, "nina"), studies.get_study(s, people),
                                   review_below=0.2, fail_below=0.1, reason="mine now")
    with pytest.raises(NotFound):
        with db.transaction() as s:
            uploads.add_data_version(s, h.user(s, "nina"), studies.get_study(s, people),
                                     data=demo.csv_bytes, filename=demo.filename, raw=raw,
                                     table=validate(raw, demo.roles), reason="mine")
    with pytest.raises(NotFound):
        h.submit(db, draft, who="nina")
    with pytest.raises(NotFound):
        h.make_fit(db, version_id, author="nina")
    assert (_count(db, DataVersion), _count(db, Fit), _count(db, AuditEvent)) == before
    with db.session() as s:
        study = s.get(Study, people)
        assert (study.review_below, study.fail_below) == (0.05, 0.01)
        assert s.get(Fit, draft).state == "draft"


def test_a_member_acts_but_only_the_owner_sets_thresholds(db, people):
    version_id = h.add_version(db, people, reason=None, who="mia")
    fit_id = h.make_fit(db, version_id, author="mia", model="linear")
    h.submit(db, fit_id, who="mia")
    with pytest.raises(Forbidden, match="Only the owner") as refused:
        with db.transaction() as s:
            studies.set_thresholds(s, h.user(s, "mia"), studies.get_study(s, people),
                                   review_below=0.1, fail_below=0.02, reason="looser")
    assert refused.value.status == 403
    with db.transaction() as s:
        studies.set_thresholds(s, h.user(s, "erin"), studies.get_study(s, people),
                               review_below=0.1, fail_below=0.02, reason="looser")
    with db.session() as s:
        assert s.get(Fit, fit_id).state == "submitted"
        assert s.get(Study, people).review_below == 0.1


def test_an_admin_may_not_change_thresholds(db, people):
    with pytest.raises(Forbidden, match="Only the owner"):
        with db.transaction() as s:
            studies.set_thresholds(s, h.user(s, "root"), studies.get_study(s, people),
                                   review_below=0.1, fail_below=0.02, reason="admin")


def test_approvers_sign_across_studies_and_only_what_was_submitted(db, people):
    fit_id = h.make_fit(db, h.add_version(db, people), model="linear")
    with pytest.raises(Conflict):
        h.sign(db, fit_id, who="abel")
    h.submit(db, fit_id)
    h.sign(db, fit_id, who="abel")
    with db.session() as s:
        assert s.get(Fit, fit_id).state == "approved"


def test_adding_and_removing_members_is_audited(db, people):
    ((added, new),) = _events(db, "study.member_add")
    assert added.study_id == people and added.object_type == "study"
    assert new == {"username": "mia", "full_name": "Mia Member", "role": "engineer"}
    assert "(erin)" in added.actor_name
    with db.transaction() as s:
        teams.remove_member(s, h.user(s, "root"), studies.get_study(s, people), "mia")
    ((removed, old),) = _events(db, "study.member_remove")
    assert old["username"] == "mia" and "(root)" in removed.actor_name
    with db.session() as s:
        assert not teams.can_read(s, h.user(s, "mia"), s.get(Study, people))
        assert s.scalar(select(func.count()).select_from(StudyMember)) == 0
    with pytest.raises(NotFound):
        h.make_fit(db, h.add_version(db, people), author="mia")


@pytest.mark.parametrize("username, message", [
    ("ghost", "no active user named 'ghost'"),
    ("abel", "not an engineer"),
    ("otto", "not an engineer"),
    ("", "Give the user name"),
])
def test_adding_someone_who_cannot_join_is_refused_naming_the_field(db, people, username,
                                                                    message):
    with pytest.raises(WorkflowError, match=message) as refused:
        with db.transaction() as s:
            teams.add_member(s, h.user(s, "erin"), studies.get_study(s, people), username)
    assert refused.value.field == "username" and refused.value.status == 400


def test_an_inactive_user_or_a_member_twice_is_refused(db, people):
    with db.transaction() as s:
        accounts.set_active(s, h.user(s, "root"), "nina", False)
    with pytest.raises(WorkflowError, match="no active user named 'nina'"):
        h.join(db, people, "nina")
    with pytest.raises(Conflict, match="already on the team"):
        h.join(db, people, "mia")
    with pytest.raises(Conflict, match="already on the team"):
        h.join(db, people, "erin")


def test_only_the_owner_or_an_admin_manages_the_team(db, people):
    with pytest.raises(Forbidden, match="owner of study .* or an admin"):
        h.join(db, people, "nina", by="mia")
    with pytest.raises(NotFound):
        h.join(db, people, "nina", by="nina")
    with pytest.raises(Forbidden):
        h.join(db, people, "nina", by="abel")
    h.join(db, people, "nina", by="root")
    assert [n["username"] for _e, n in _events(db, "study.member_add")] == ["mia", "nina"]


def test_the_owner_cannot_be_removed(db, people):
    with pytest.raises(WorkflowError, match="owns study") as refused:
        with db.transaction() as s:
            teams.remove_member(s, h.user(s, "root"), studies.get_study(s, people), "erin")
    assert refused.value.field == "username"
    with pytest.raises(NotFound, match="not on the team"):
        with db.transaction() as s:
            teams.remove_member(s, h.user(s, "erin"), studies.get_study(s, people), "nina")


def test_threshold_changes_after_submission_are_found(db, people):
    fit_id = h.make_fit(db, h.add_version(db, people), model="linear")
    with db.transaction() as s:
        studies.set_thresholds(s, h.user(s, "erin"), studies.get_study(s, people),
                               review_below=0.1, fail_below=0.02, reason="before submission")
    h.submit(db, fit_id)
    with db.transaction() as s:
        studies.set_thresholds(s, h.user(s, "erin"), studies.get_study(s, people),
                               review_below=0.2, fail_below=0.05, reason="after submission")
    draft = h.make_fit(db, h.add_version(db, people, reason="again"), model="linear")
    with db.session(write=False) as s:
        fit = fits.get_fit(s, fit_id)
        changes = teams.threshold_changes_after(s, people, fit.submitted_at)
        assert [e.reason for e in changes] == ["after submission"]
        assert json.loads(changes[0].old_json) == {"review_below": 0.1, "fail_below": 0.02}
        assert json.loads(changes[0].new_json) == {"review_below": 0.2, "fail_below": 0.05}
        # a fit never submitted has nothing to compare against
        assert teams.threshold_changes_after(s, people, fits.get_fit(s, draft).submitted_at) \
            == []
