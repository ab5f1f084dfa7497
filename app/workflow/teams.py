"""Study teams: who may read a study and act on it. The one place for the rule.

The rule (DESIGN.md, "Sign-off rules")
    * A study's team is its owner (``studies.owner_id``, always a member) and the engineers
      added as :class:`~app.store.models.StudyMember` rows.
    * Approvers, auditors and admins read every study: their roles are site-wide (an admin
      needs to see a study to manage its team). Engineers read only the studies whose team
      they are on.
    * Acting on a study (uploading data, fitting, submitting, proposing setpoints, recording
      confirmation runs, any write under it) needs the engineer role and team membership.
      Signing is the approvers' and stays site-wide; they sign only what was submitted
      (app.workflow.reviews).
    * Thresholds change only by the owner. The team is managed by the owner or an admin.
    * Someone who may not read a study gets the same answer as for a study that does not exist
      (:class:`~app.workflow.NotFound`, HTTP 404), for the study and for everything under it,
      so the numbering does not tell them what exists. Someone who may read it but not do the
      step gets :class:`~app.workflow.Forbidden` (403).

Lookups (:func:`study_for`, :func:`fit_for`, :func:`version_for`, :func:`proposal_for`) load a
row for a user and raise NotFound when it is missing or unreadable. Services that write call
:func:`require_act` (or :func:`require_owner`, :func:`require_manager`) on the actor.
Refused team and threshold changes, and refused writes by people outside the team, are audited
by :func:`record_refusal` in a transaction of their own, as signing refusals are.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import bindparam, exists, or_, select
from sqlalchemy.orm import Session

from app.store import audit
from app.store.models import (
    STUDY_MEMBER_ROLES,
    AuditEvent,
    DataVersion,
    Fit,
    Plan,
    SetpointProposal,
    Study,
    StudyMember,
    User,
)
from app.workflow import Conflict, Forbidden, NotFound, WorkflowError, in_id_range

SITE_WIDE_READERS = ("approver", "auditor", "admin")
REFUSED = "study.refused"

# The rule in the words the study page shows.
TEAM_RULES = (
    "Engineers read and work only in studies whose team they are on; the owner is always on "
    "the team.",
    "Approvers, auditors and admins read every study.",
    "Only the owner changes the thresholds; the owner or an admin manages the team.",
)


# ---- the rule --------------------------------------------------------------------------------

def is_owner(user: User | None, study: Study) -> bool:
    return user is not None and study.owner_id == user.id


def is_member(session: Session, user: User | None, study: Study) -> bool:
    """On the study's team: its owner, or an engineer added to it."""
    if user is None:
        return False
    if is_owner(user, study):
        return True
    return session.scalar(select(StudyMember.id).where(
        StudyMember.study_id == study.id, StudyMember.user_id == user.id)) is not None


def reads_everything(user: User | None) -> bool:
    return user is not None and user.has_role(*SITE_WIDE_READERS)


def can_read(session: Session, user: User | None, study: Study) -> bool:
    return reads_everything(user) or is_member(session, user, study)


def can_act(session: Session, user: User | None, study: Study) -> bool:
    """May do an engineer's work in the study: the engineer role and a place on its team."""
    return user is not None and user.has_role("engineer") and is_member(session, user, study)


def can_manage(user: User | None, study: Study) -> bool:
    """May add and remove team members: the owner or an admin."""
    return is_owner(user, study) or (user is not None and user.has_role("admin"))


def can_set_thresholds(user: User | None, study: Study) -> bool:
    return is_owner(user, study) and user.has_role("engineer")


def _hidden(study_id: Any) -> NotFound:
    # The same words as for a study that does not exist.
    return NotFound(f"No study {study_id}.", field="study")


def require_read(session: Session, user: User | None, study: Study) -> None:
    if not can_read(session, user, study):
        raise _hidden(study.id)


def require_act(session: Session, user: User | None, study: Study, doing: str) -> None:
    """NotFound when the user may not even read the study, Forbidden when they may read it but
    are not an engineer on its team."""
    require_read(session, user, study)
    if not can_act(session, user, study):
        raise Forbidden(f"Only an engineer on the team of study {study.id} may {doing}.",
                        field="team")


def require_owner(session: Session, user: User | None, study: Study, doing: str) -> None:
    require_read(session, user, study)
    if not can_set_thresholds(user, study):
        raise Forbidden(f"Only the owner of study {study.id} may {doing}.", field="owner")


def require_manager(session: Session, user: User | None, study: Study, doing: str) -> None:
    require_read(session, user, study)
    if not can_manage(user, study):
        raise Forbidden(f"Only the owner of study {study.id} or an admin may {doing}.",
                        field="team")


# ---- lookups for a user ----------------------------------------------------------------------

def study_for(session: Session, user: User | None, study_id: int) -> Study:
    """The study, when it exists and ``user`` may read it; otherwise NotFound."""
    study = session.get(Study, study_id) if in_id_range(study_id) else None
    if study is None or not can_read(session, user, study):
        raise _hidden(study_id)
    return study


def fit_for(session: Session, user: User | None, fit_id: int) -> Fit:
    fit = session.get(Fit, fit_id) if in_id_range(fit_id) else None
    if fit is None or not can_read(session, user, fit.study):
        raise NotFound(f"No fit {fit_id}.", field="fit")
    return fit


def version_for(session: Session, user: User | None, version_id: int) -> DataVersion:
    version = session.get(DataVersion, version_id) if in_id_range(version_id) else None
    if version is None or not can_read(session, user, version.study):
        raise NotFound(f"No data version {version_id}.", field="data_version")
    return version


def proposal_for(session: Session, user: User | None, proposal_id: int) -> SetpointProposal:
    proposal = (session.get(SetpointProposal, proposal_id) if in_id_range(proposal_id)
                else None)
    if proposal is None or not can_read(session, user, proposal.study):
        raise NotFound(f"No setpoint proposal {proposal_id}.", field="setpoint")
    return proposal


def plan_for(session: Session, user: User | None, plan_id: int) -> Plan:
    plan = session.get(Plan, plan_id) if in_id_range(plan_id) else None
    if plan is None or not can_read(session, user, plan.study):
        raise NotFound(f"No plan {plan_id}.", field="plan")
    return plan


# The lookup for each id a route may carry in its address (app.web.access checks them all).
LOOKUPS = {"study_id": study_for, "fit_id": fit_for, "version_id": version_for,
           "proposal_id": proposal_for, "plan_id": plan_for}


def _reader_query(model) -> Any:
    """One statement for an id in an address: its study's owner and whether a given user is
    on that study's team (no row when the id names nothing)."""
    table, studies = model.__table__, Study.__table__
    study_id = table.c.id if model is Study else table.c.study_id
    source = table if model is Study else table.join(studies, studies.c.id == study_id)
    members = StudyMember.__table__
    on_team = exists().where(members.c.study_id == study_id,
                             members.c.user_id == bindparam("user_id"))
    return (select(studies.c.owner_id, on_team).select_from(source)
            .where(table.c.id == bindparam("object_id")))


_READERS = {kind: _reader_query(model) for kind, model in (
    ("study_id", Study), ("fit_id", Fit), ("version_id", DataVersion),
    ("proposal_id", SetpointProposal), ("plan_id", Plan))}


def may_read(session: Session, user: User | None, kind: str, object_id: int) -> bool:
    """The rule of the lookups above for an id in an address, in one statement and without
    loading objects (pages ask it on every request): False when the row is missing or
    ``user`` may not read its study. The lookups stay the way to load the row."""
    if user is None or not in_id_range(object_id):
        return False
    row = session.execute(_READERS[kind], {"object_id": object_id, "user_id": user.id}).first()
    if row is None:
        return False
    return reads_everything(user) or row[0] == user.id or bool(row[1])


def study_id_of(session: Session, kind: str, object_id: int) -> int | None:
    """The study an id in an address belongs to (None when there is no such row)."""
    model = {"study_id": Study, "fit_id": Fit, "version_id": DataVersion,
             "proposal_id": SetpointProposal, "plan_id": Plan}[kind]
    row = session.get(model, object_id) if in_id_range(object_id) else None
    if row is None:
        return None
    return row.id if model is Study else row.study_id


def readable_studies(session: Session, user: User | None) -> list[Study]:
    """The studies ``user`` may read, newest first."""
    query = select(Study).order_by(Study.created_at.desc(), Study.id.desc())
    if not reads_everything(user):
        if user is None:
            return []
        query = query.where(or_(Study.owner_id == user.id, exists().where(
            StudyMember.study_id == Study.id, StudyMember.user_id == user.id)))
    return list(session.scalars(query))


# ---- the team --------------------------------------------------------------------------------

def team(session: Session, study: Study) -> list[dict[str, Any]]:
    """The owner first, then the members in the order they were added."""
    rows = session.scalars(select(StudyMember).where(StudyMember.study_id == study.id)
                           .order_by(StudyMember.id))
    out = [{"user": study.owner, "role": "owner", "added_by": None, "added_at":
            study.created_at}]
    out += [{"user": m.user, "role": m.role, "added_by": m.added_by, "added_at": m.added_at}
            for m in rows]
    return out


def _user_named(session: Session, username: str | None) -> User | None:
    name = (username or "").strip()
    if not name:
        raise WorkflowError("Give the user name of the person to add.", field="username")
    return session.scalar(select(User).where(User.username == name))


def add_member(session: Session, actor: User, study: Study, username: str,
               role: str = "engineer") -> StudyMember:
    """Put an active engineer on the study's team (owner or admin only), audited."""
    require_manager(session, actor, study, "change its team")
    if role not in STUDY_MEMBER_ROLES:
        raise WorkflowError(f"A team member's role must be one of: "
                            f"{', '.join(STUDY_MEMBER_ROLES)} (got '{role}').", field="role")
    user = _user_named(session, username)
    if user is None or not user.active:
        raise WorkflowError(f"There is no active user named '{(username or '').strip()}'.",
                            field="username")
    if not user.has_role("engineer"):
        raise WorkflowError(f"'{user.username}' is not an engineer; only engineers join a "
                            "study's team (approvers and auditors read every study).",
                            field="username")
    if is_member(session, user, study):
        raise Conflict(f"'{user.username}' is already on the team of study {study.id}.",
                            field="username")
    member = StudyMember(study_id=study.id, user_id=user.id, role=role, added_by_id=actor.id)
    session.add(member)
    session.flush()
    audit.record(session, actor=actor, action="study.member_add", object_type="study",
                 object_id=study.id, study_id=study.id,
                 new={"username": user.username, "full_name": user.full_name, "role": role})
    return member


def remove_member(session: Session, actor: User, study: Study, username: str) -> None:
    """Take an engineer off the study's team (owner or admin only; never the owner), audited."""
    require_manager(session, actor, study, "change its team")
    user = _user_named(session, username)
    if user is not None and is_owner(user, study):
        raise WorkflowError(f"'{user.username}' owns study {study.id} and stays on its team.",
                            field="username")
    member = None if user is None else session.scalar(select(StudyMember).where(
        StudyMember.study_id == study.id, StudyMember.user_id == user.id))
    if member is None:
        raise NotFound(f"'{(username or '').strip()}' is not on the team of study {study.id}.",
                       field="username")
    old = {"username": user.username, "full_name": user.full_name, "role": member.role}
    session.delete(member)
    session.flush()
    audit.record(session, actor=actor, action="study.member_remove", object_type="study",
                 object_id=study.id, study_id=study.id, old=old)


# ---- refusals --------------------------------------------------------------------------------

def record_refusal(session: Session, actor: User, study_id: int, doing: str,
                   exc: WorkflowError) -> None:
    """Audit a refused team change, threshold change or write under a study, in a transaction
    of its own (the refused one was rolled back). ``doing`` says what was tried."""
    cause = "not on the team" if isinstance(exc, NotFound) else (
        "not permitted" if isinstance(exc, Forbidden) else "invalid request")
    exists_ = in_id_range(study_id) and session.get(Study, study_id) is not None
    audit.record(session, actor=actor, action=REFUSED, object_type="study",
                 object_id=study_id, study_id=study_id if exists_ else None,
                 new={"attempted": doing, "cause": cause, "why": exc.message})


def threshold_changes_after(session: Session, study_id: int, since) -> list[Any]:
    """The study's threshold changes recorded after ``since`` (e.g. a fit's submission)."""
    if since is None:
        return []
    return list(session.scalars(select(AuditEvent).where(
        AuditEvent.study_id == study_id, AuditEvent.action == "study.set_thresholds",
        AuditEvent.at > since).order_by(AuditEvent.seq)))
