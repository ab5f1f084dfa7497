"""Studies and their check thresholds."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store import audit
from app.store.models import Study, User
from app.workflow import NotFound, WorkflowError, in_id_range, teams


def _clean(value: str | None, field: str, *, required: bool, limit: int) -> str:
    text = (value or "").strip()
    if required and not text:
        raise WorkflowError(f"The study's {field} is required.", field=field)
    if len(text) > limit:
        raise WorkflowError(f"The study's {field} is longer than {limit} characters.", field=field)
    return text


def check_thresholds(review_below: float, fail_below: float) -> None:
    if not (0 < fail_below < review_below < 1):
        raise WorkflowError("Thresholds need 0 < fail below < review below < 1 "
                            f"(got fail {fail_below}, review {review_below}).", field="thresholds")


def create_study(session: Session, actor: User, *, title: str, purpose: str = "",
                 process: str = "", review_below: float = 0.05, fail_below: float = 0.01) -> Study:
    check_thresholds(review_below, fail_below)
    study = Study(title=_clean(title, "title", required=True, limit=200),
                  purpose=_clean(purpose, "purpose", required=False, limit=5000),
                  process=_clean(process, "process", required=False, limit=2000),
                  owner_id=actor.id, review_below=review_below, fail_below=fail_below)
    session.add(study)
    session.flush()
    audit.record(session, actor=actor, action="study.create", object_type="study",
                 object_id=study.id, study_id=study.id, new=study_summary(study))
    return study


def study_summary(study: Study) -> dict:
    return {"title": study.title, "purpose": study.purpose, "process": study.process,
            "owner_id": study.owner_id, "review_below": study.review_below,
            "fail_below": study.fail_below}


def get_study(session: Session, study_id: int) -> Study:
    study = session.get(Study, study_id) if in_id_range(study_id) else None
    if study is None:
        raise NotFound(f"No study {study_id}.", field="study")
    return study


def list_studies(session: Session) -> list[Study]:
    return list(session.scalars(select(Study).order_by(Study.created_at.desc())))


def set_thresholds(session: Session, actor: User, study: Study, *, review_below: float,
                   fail_below: float, reason: str) -> Study:
    """Only the study's owner changes its thresholds (app.workflow.teams), with a reason."""
    teams.require_owner(session, actor, study, "change its thresholds")
    check_thresholds(review_below, fail_below)
    if not (reason or "").strip():
        raise WorkflowError("Changing thresholds needs a reason.", field="reason")
    old = {"review_below": study.review_below, "fail_below": study.fail_below}
    study.review_below, study.fail_below = review_below, fail_below
    audit.record(session, actor=actor, action="study.set_thresholds", object_type="study",
                 object_id=study.id, study_id=study.id, old=old,
                 new={"review_below": review_below, "fail_below": fail_below},
                 reason=reason.strip())
    return study
