"""What waits for whom: fits submitted for review and setpoint proposals awaiting release (for
approvers), and fits returned to the engineer who made or submitted them.

Reads only. Whether the viewer may sign an item is answered by the one set of signing rules
(app.workflow.signing), so the queue never offers what the signature would refuse; the reason is
shown instead. Ages are measured from the submission (fits), the proposal (setpoints) or the
return signature, against ``now`` (the server's UTC clock).
"""

from __future__ import annotations

import json
from datetime import datetime
from typing import Any

from sqlalchemy import exists, select
from sqlalchemy.orm import Session, joinedload

from app.store.base import utcnow
from app.store.models import Fit, SetpointProposal, Signature, User
from app.workflow import WorkflowError, signing, teams
from app.workflow.reviews import RETURN

REVIEW_STATES = ("submitted", "approved", "returned", "draft", "superseded", "withdrawn")


def age_words(seconds: float) -> str:
    """A waiting time in the largest two units that matter: '3 d 4 h', '2 h 5 min', '40 s'."""
    seconds = max(0, int(seconds))
    days, rest = divmod(seconds, 86_400)
    hours, rest = divmod(rest, 3_600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h"
    if hours:
        return f"{hours} h {minutes} min"
    if minutes:
        return f"{minutes} min"
    return f"{secs} s"


def _may_sign(user: User, check) -> tuple[bool, str | None]:
    if not user.has_role("approver"):
        return False, "Only approvers sign."
    try:
        check()
    except WorkflowError as exc:
        return False, exc.message
    return True, None


def _readable(session: Session, user: User, query, study_id):
    """Keep to the studies ``user`` may read (the teams rule); ``study_id`` is the column."""
    if teams.reads_everything(user):
        return query
    return query.where(study_id.in_([s.id for s in teams.readable_studies(session, user)]))


def fits_in_state(session: Session, user: User, state: str = "submitted",
                  now: datetime | None = None) -> list[dict[str, Any]]:
    """Fits in ``state`` that ``user`` may read, oldest submission first, each with how long it
    has waited and whether ``user`` may sign it (and why not)."""
    if state not in REVIEW_STATES:
        raise WorkflowError(f"state must be one of {', '.join(REVIEW_STATES)} (got '{state}').",
                            field="state")
    now = now or utcnow()
    query = (select(Fit).where(Fit.state == state)
             .options(joinedload(Fit.study), joinedload(Fit.created_by),
                      joinedload(Fit.submitted_by), joinedload(Fit.data_version))
             .order_by(Fit.submitted_at.is_(None), Fit.submitted_at, Fit.id))
    items = []
    for fit in session.scalars(_readable(session, user, query, Fit.study_id)):
        since = fit.submitted_at or fit.created_at
        may, why = _may_sign(user, lambda f=fit: signing.check_fit_signer(user, f))
        items.append({"kind": "fit", "fit": fit, "study": fit.study, "since": since,
                      "waiting_seconds": (now - since).total_seconds(),
                      "waiting": age_words((now - since).total_seconds()),
                      "may_sign": may and state == "submitted", "why_not": why})
    return items


def proposals_awaiting_release(session: Session, user: User,
                               now: datetime | None = None) -> list[dict[str, Any]]:
    """Setpoint proposals waiting for their release signature, oldest first."""
    now = now or utcnow()
    query = (select(SetpointProposal).where(SetpointProposal.state == "draft")
             .options(joinedload(SetpointProposal.study), joinedload(SetpointProposal.created_by))
             .order_by(SetpointProposal.created_at, SetpointProposal.id))
    proposals = list(session.scalars(_readable(session, user, query,
                                                 SetpointProposal.study_id)))
    # the fits behind every waiting proposal in one statement, not one per proposal
    wanted = {p.id: json.loads(p.fit_ids_json) for p in proposals}
    ids = {i for fit_ids in wanted.values() for i in fit_ids}
    by_id = {f.id: f for f in session.scalars(select(Fit).where(Fit.id.in_(ids)))} if ids else {}
    items = []
    for proposal in proposals:
        used = [by_id[i] for i in wanted[proposal.id] if i in by_id]
        may, why = _may_sign(user, lambda p=proposal, u=used: signing.check_releaser(user, p, u))
        seconds = (now - proposal.created_at).total_seconds()
        items.append({"kind": "setpoints", "proposal": proposal, "study": proposal.study,
                      "since": proposal.created_at, "waiting_seconds": seconds,
                      "waiting": age_words(seconds), "may_sign": may, "why_not": why})
    return items


def returned_to(session: Session, user: User, now: datetime | None = None) -> list[dict]:
    """Fits returned for rework that ``user`` made or submitted and that no fit of the same
    study and response made since the return has answered yet, each with the returning
    signature."""
    now = now or utcnow()
    query = (select(Fit).where(Fit.state == "returned",
                               (Fit.created_by_id == user.id) | (Fit.submitted_by_id == user.id))
             .options(joinedload(Fit.study), joinedload(Fit.signatures))
             .order_by(Fit.id))
    items = []
    for fit in session.scalars(query).unique():
        back = [s for s in fit.signatures if s.meaning == RETURN] or list(fit.signatures)
        signature: Signature | None = back[-1] if back else None
        since = signature.signed_at if signature else fit.created_at
        answered = session.scalar(select(exists().where(
            Fit.study_id == fit.study_id, Fit.response == fit.response, Fit.id != fit.id,
            Fit.created_at > since)))
        if answered or not teams.can_read(session, user, fit.study):
            continue
        seconds = (now - since).total_seconds()
        items.append({"kind": "fit", "fit": fit, "study": fit.study, "signature": signature,
                      "since": since, "waiting_seconds": seconds, "waiting": age_words(seconds)})
    return items
