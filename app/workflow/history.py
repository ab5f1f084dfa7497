"""The auditor's read-only views: a study's timeline, exports, and the integrity check."""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass
from datetime import UTC, datetime, time
from typing import Any

from sqlalchemy import or_, select
from sqlalchemy.orm import Session

from app.store import audit, keys
from app.store.models import AuditEvent, DataVersion, Fit, SetpointProposal, Study
from app.workflow import NotFound, WorkflowError, in_id_range
from app.workflow.csvsafe import neutralise_all as neutralise
from app.workflow.fits import snapshot_intact
from app.workflow.reviews import check_signature
from app.workflow.uploads import sha256_bytes

EXPORT_COLUMNS = ("seq", "at", "actor_name", "action", "object_type", "object_id", "reason",
                  "old_json", "new_json", "prev_hash", "hash")


@dataclass(frozen=True)
class Filters:
    object_type: str = ""
    person: str = ""
    action: str = ""
    date_from: str = ""
    date_to: str = ""

    @classmethod
    def from_args(cls, args) -> Filters:
        return cls(**{k: (args.get(k) or "").strip() for k in cls.__dataclass_fields__})


def _day(text: str, field: str, at: time) -> datetime:
    """The moment ``at`` (UTC) on the day ``text`` (YYYY-MM-DD, years 1 to 9999)."""
    try:
        return datetime.combine(datetime.strptime(text, "%Y-%m-%d").date(), at, UTC)
    except ValueError:
        shown = text if len(text) <= 24 else text[:20] + "…"
        raise WorkflowError(f"Field '{field}': '{shown}' is not a date like 2026-03-31 "
                            "(years 0001 to 9999).", field=field) from None


def timeline(session: Session, study: Study, filters: Filters = Filters()) -> list[AuditEvent]:
    """A study's events in chain order, filtered by object type, person, action and date (UTC).

    ``person`` matches the recorded actor name (full name and user name) as a substring;
    ``action`` matches a whole action or a prefix ending in a dot, e.g. ``fit.``.
    """
    query = select(AuditEvent).where(AuditEvent.study_id == study.id)
    if filters.object_type:
        query = query.where(AuditEvent.object_type == filters.object_type)
    if filters.person:
        query = query.where(AuditEvent.actor_name.ilike(f"%{filters.person}%"))
    if filters.action:
        query = query.where(or_(AuditEvent.action == filters.action,
                                AuditEvent.action.startswith(filters.action.rstrip(".") + ".")))
    if filters.date_from:
        query = query.where(AuditEvent.at >= _day(filters.date_from, "date_from", time.min))
    if filters.date_to:
        # Up to the day's last microsecond (the stored precision): the day after 9999-12-31
        # is no date, so "before the next day" cannot be written for it.
        query = query.where(AuditEvent.at <= _day(filters.date_to, "date_to", time.max))
    return list(session.scalars(query.order_by(AuditEvent.seq)))


def facets(session: Session, study: Study) -> dict[str, list[str]]:
    """The values present in a study's trail, for the filter choices."""
    rows = session.execute(select(AuditEvent.object_type, AuditEvent.action, AuditEvent.actor_name)
                           .where(AuditEvent.study_id == study.id)).all()
    return {"object_types": sorted({r[0] for r in rows}), "actions": sorted({r[1] for r in rows}),
            "people": sorted({r[2] for r in rows})}


def get_event(session: Session, event_id: int) -> AuditEvent:
    event = session.get(AuditEvent, event_id) if in_id_range(event_id) else None
    if event is None:
        raise NotFound(f"No event {event_id}.", field="event")
    return event


def events_of_fit(session: Session, fit: Fit) -> list[AuditEvent]:
    return list(session.scalars(select(AuditEvent).where(
        AuditEvent.object_type == "fit", AuditEvent.object_id == str(fit.id))
        .order_by(AuditEvent.seq)))


def decoded(text: str | None) -> Any:
    return None if text is None else json.loads(text)


def export_csv(study: Study, events: list[AuditEvent], head: tuple[int, str]) -> bytes:
    """The trail as CSV: a short preamble (study, chain head), then one row per event."""
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow([neutralise(c) for c in ("study", study.id, study.title)])
    writer.writerow(["chain head", head[0], head[1]])
    writer.writerow([])
    writer.writerow(EXPORT_COLUMNS)
    for event in events:
        values = audit.event_to_dict(event)
        writer.writerow([neutralise(values[c]) for c in EXPORT_COLUMNS])
    return out.getvalue().encode("utf-8")


def export_json(study: Study, events: list[AuditEvent], head: tuple[int, str]) -> bytes:
    doc = {"study": {"id": study.id, "title": study.title},
           "chain_head": {"seq": head[0], "hash": head[1]},
           "events": [audit.event_to_dict(e) for e in events]}
    return json.dumps(doc, indent=1, ensure_ascii=False, sort_keys=True).encode("utf-8")


def integrity(session: Session) -> dict[str, Any]:
    """The chain with its seals; every data version's hashes; every fit and setpoint snapshot,
    fit and setpoint signature and confirmation run with its seal; and the replay of the trail
    against the tables (:mod:`app.workflow.replay`)."""
    from app.workflow import confirmations, replay, setpoints

    chain, disagreements = replay.verified_replay(session)  # one reading of the trail
    versions = [{"version": v, "original_ok": sha256_bytes(v.original_bytes) == v.original_sha256,
                 "canonical_ok": sha256_bytes(v.canonical_csv) == v.canonical_sha256}
                for v in session.scalars(select(DataVersion).order_by(DataVersion.id))]
    fit_rows, signature_rows, setpoint_rows, confirmation_rows = [], [], [], []
    for fit in session.scalars(select(Fit).order_by(Fit.id)):
        seal = keys.seal_state(session, "fit", fit.snapshot_sha256, fit.key_id, fit.seal)
        fit_rows.append({"fit": fit, "intact": snapshot_intact(fit), "seal": seal})
        for sig in fit.signatures:
            signature_rows.append({"object": f"fit {fit.id}", "signature": sig,
                                   "check": check_signature(fit, sig)})
    for proposal in session.scalars(select(SetpointProposal).order_by(SetpointProposal.id)):
        seal = keys.seal_state(session, "setpoint", proposal.snapshot_sha256, proposal.key_id,
                               proposal.seal)
        setpoint_rows.append({"proposal": proposal, "seal": seal,
                              "intact": setpoints.proposal_intact(session, proposal)})
        for sig in setpoints.release_signatures(session, proposal):
            signature_rows.append({"object": f"setpoint {proposal.id}", "signature": sig,
                                   "check": setpoints.signature_check(session, proposal, sig)})
        for run in proposal.confirmations:
            digest = confirmations.record_sha256(run)
            confirmation_rows.append({
                "run": run, "proposal": proposal,
                "verdict": confirmations.results_of(run).get("verdict"),
                "seal": keys.seal_state(session, "confirmation", digest, run.key_id, run.seal)})
    ok = (chain.ok and all(v["original_ok"] and v["canonical_ok"] for v in versions)
          and all(f["intact"] for f in fit_rows) and all(p["intact"] for p in setpoint_rows)
          and all(s["check"].status != "invalid" for s in signature_rows)
          and not any(r["seal"] in BAD_SEALS
                      for r in (*fit_rows, *setpoint_rows, *confirmation_rows))
          and not disagreements)
    return {"ok": ok, "chain": chain, "versions": versions, "fits": fit_rows,
            "setpoints": setpoint_rows, "signatures": signature_rows,
            "confirmations": confirmation_rows, "disagreements": disagreements}


BAD_SEALS = (keys.BROKEN, keys.KEY_NOT_HELD)
