"""Replay the audit trail and hold the tables to it.

The chain check (:func:`app.store.audit.verify`) proves the trail is whole and every event
sealed; this module proves the tables say what the trail says. Reading the events in order it
rebuilds, for every fit and setpoint proposal, the snapshot hash it was created with, the state
its last transition left it in and the signatures the transitions added; for every data version
the hashes of its upload; for every confirmation run its record digest and verdict. It then
reads the tables and names each disagreement with the object and the event: a state moved
without a signing event, a signature row that no event added or that differs from the one an
event added, a signature or row that was deleted, a snapshot hash that is not the one recorded
at creation, a row whose seal does not hold.

A row without a seal is accepted only when the event that created it is itself from before
sealing began (migration 0007); events cannot be rewritten without breaking their own seals.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store import audit, keys
from app.store.audit import EVENT_COLUMNS, event_hash, iso, stored_events
from app.store.models import (
    AuditEvent,
    ConfirmationRun,
    DataVersion,
    Fit,
    SetpointProposal,
    Signature,
)
from app.workflow.digests import confirmation_record_sha256 as record_sha256
from app.workflow.digests import fit_runs_problem, fit_snapshot_sha256, setpoint_snapshot_sha256
from app.workflow.signing import manifest_document, manifest_sha256

CREATES = {"fit.create": "fit", "setpoint.propose": "setpoint"}
SIGNED_TYPES = ("fit", "setpoint")
# Actions the replay reads about other kinds of object (uploads, confirmation runs); the events
# of every other action on them leave the trail's state as it is.
OTHER_ACTIONS = ("data.upload", "setpoint.confirmation")


@dataclass(frozen=True)
class Disagreement:
    """One place where a table does not say what the trail says."""

    kind: str            # fit | setpoint | signature | data version | confirmation run
    object_id: int | str
    problem: str
    event_seq: int | None = None

    @property
    def object(self) -> str:
        return f"{self.kind} {self.object_id}"

    def describe(self) -> str:
        where = f" (event #{self.event_seq})" if self.event_seq is not None else ""
        return f"{self.object}: {self.problem}{where}"


@dataclass
class _Tracked:
    seq: int                     # the creating event
    sealed: bool                 # whether that event is sealed
    values: dict[str, Any]
    state: str | None = None
    state_seq: int | None = None


@dataclass
class Trail:
    """What the trail says, object by object."""

    objects: dict[tuple[str, int], _Tracked] = field(default_factory=dict)
    signatures: dict[int, _Tracked] = field(default_factory=dict)
    versions: dict[int, _Tracked] = field(default_factory=dict)
    confirmations: dict[int, _Tracked] = field(default_factory=dict)

    @staticmethod
    def reads(action: str, kind: str) -> bool:
        """Whether :meth:`feed` reads an event of ``action`` on an object of ``kind``; the
        others leave the trail's state as it is."""
        return kind in SIGNED_TYPES or action in OTHER_ACTIONS

    def feed(self, ev: dict[str, Any]) -> None:
        action, kind, seq = ev["action"], ev["object_type"], ev["seq"]
        if not self.reads(action, kind):
            return  # spare decoding its JSON
        sealed = bool(ev.get("seal"))
        new = _loads(ev.get("new_json"))
        oid = _int(ev.get("object_id"))
        if oid is None or not isinstance(new, dict):
            return
        if action in CREATES and kind == CREATES[action]:
            self.objects[(kind, oid)] = _Tracked(seq, sealed, {
                "snapshot_sha256": new.get("snapshot_sha256")}, "draft", seq)
        elif action == "data.upload":
            self.versions[oid] = _Tracked(seq, sealed, {
                k: new.get(k) for k in ("original_sha256", "canonical_sha256")})
        if kind in SIGNED_TYPES and "state" in new and (kind, oid) in self.objects:
            tracked = self.objects[(kind, oid)]
            tracked.state, tracked.state_seq = new["state"], seq
        signature = new.get("signature")
        if kind in SIGNED_TYPES and isinstance(signature, dict) and _int(signature.get("id")):
            self.signatures[int(signature["id"])] = _Tracked(seq, sealed, signature)
        run = _int(new.get("confirmation_run"))
        if action == "setpoint.confirmation" and run is not None:
            self.confirmations[run] = _Tracked(seq, sealed, {
                "setpoint_id": oid, **{k: new.get(k) for k in
                                       ("original_sha256", "record_sha256", "verdict")}})


def _loads(text: str | None) -> Any:
    try:
        return None if text is None else json.loads(text)
    except ValueError:
        return None


def _int(value: Any) -> int | None:
    try:
        return int(value)
    except (TypeError, ValueError):
        return None


def read_trail(events: Iterable[dict[str, Any]]) -> Trail:
    trail = Trail()
    for ev in events:
        trail.feed(ev)
    return trail


def _seal(session: Session, kind: str, digest: str, row: Any, created: _Tracked | None,
          label: str, oid: int) -> Iterator[Disagreement]:
    state = keys.seal_state(session, kind, digest, row.key_id, row.seal)
    if state in (keys.SEALED, keys.UNCHECKED):
        return
    if state == keys.UNSEALED and created is not None and not created.sealed:
        return  # written before sealing began, like the event that created it
    yield Disagreement(label, oid, keys.SEAL_PROBLEMS[state],
                       None if created is None else created.seq)


def _signed_object(session: Session, kind: str, row: Any, stored_hash: str,
                   recomputed: str, trail: Trail) -> Iterator[Disagreement]:
    tracked = trail.objects.get((kind, row.id))
    label = "fit" if kind == "fit" else "setpoint"
    if tracked is None:
        yield Disagreement(label, row.id, "no event records its creation")
        return
    recorded = tracked.values["snapshot_sha256"]
    if recomputed != stored_hash:
        yield Disagreement(label, row.id, "its stored snapshot no longer hashes to its "
                                          "recorded SHA-256 (content altered)", tracked.seq)
    if kind == "fit" and (problem := fit_runs_problem(row)) is not None:
        yield Disagreement(label, row.id, problem, tracked.seq)
    if stored_hash != recorded:
        yield Disagreement(label, row.id, f"its snapshot SHA-256 {stored_hash[:12]}… is not the "
                                          f"{str(recorded)[:12]}… recorded at creation",
                           tracked.seq)
    if row.state != tracked.state:
        yield Disagreement(label, row.id, f"it is '{row.state}' but the trail leaves it "
                                          f"'{tracked.state}'", tracked.state_seq)
    yield from _seal(session, kind, stored_hash, row, tracked, label, row.id)


def _signature(session: Session, sig: Signature, trail: Trail) -> Iterator[Disagreement]:
    tracked = trail.signatures.get(sig.id)
    if tracked is None:
        yield Disagreement("signature", sig.id, "no event records it being signed")
        return
    recomputed = manifest_sha256(sig)
    if recomputed != sig.manifest_sha256:
        yield Disagreement("signature", sig.id, "its manifest no longer hashes to its stored "
                                                "SHA-256 (altered)", tracked.seq)
    recorded = tracked.values
    document = manifest_document(sig)
    differing = sorted(k for k, v in document.items() if recorded.get(k) != v)
    if recorded.get("manifest_sha256") != sig.manifest_sha256:
        differing.append("manifest_sha256")
    if differing:
        yield Disagreement("signature", sig.id, "it differs from the signature the trail "
                                                f"recorded in {', '.join(differing)}",
                           tracked.seq)
    yield from _seal(session, "signature", sig.manifest_sha256, sig, tracked, "signature",
                     sig.id)


def compare(session: Session, trail: Trail) -> list[Disagreement]:
    """Every disagreement between the tables and ``trail``, fits first."""
    out: list[Disagreement] = []
    seen: set[tuple[str, int]] = set()
    for fit in session.scalars(select(Fit).order_by(Fit.id)):
        seen.add(("fit", fit.id))
        out.extend(_signed_object(session, "fit", fit, fit.snapshot_sha256,
                                  fit_snapshot_sha256(fit), trail))
    for proposal in session.scalars(select(SetpointProposal).order_by(SetpointProposal.id)):
        seen.add(("setpoint", proposal.id))
        out.extend(_signed_object(session, "setpoint", proposal, proposal.snapshot_sha256,
                                  setpoint_snapshot_sha256(session, proposal), trail))
    for (kind, oid), tracked in sorted(trail.objects.items()):
        if (kind, oid) not in seen:
            out.append(Disagreement(kind, oid, "the trail records it but the table has no such "
                                               "row (deleted)", tracked.seq))
    signed_ids = set()
    for sig in session.scalars(select(Signature).order_by(Signature.id)):
        signed_ids.add(sig.id)
        out.extend(_signature(session, sig, trail))
    for sid, tracked in sorted(trail.signatures.items()):
        if sid not in signed_ids:
            target = ("fit", tracked.values.get("fit_id"))
            if tracked.values.get("setpoint_id") is not None:
                target = ("setpoint", tracked.values["setpoint_id"])
            out.append(Disagreement("signature", sid, f"the trail records it on {target[0]} "
                                                      f"{target[1]} but it is missing "
                                                      "(deleted)", tracked.seq))
    out.extend(_versions(session, trail))
    out.extend(_confirmations(session, trail))
    return out


def _versions(session: Session, trail: Trail) -> Iterator[Disagreement]:
    table = DataVersion.__table__
    rows = session.execute(select(table.c.id, table.c.original_sha256, table.c.canonical_sha256)
                           .order_by(table.c.id))
    present = set()
    for vid, original, canonical in rows:
        present.add(vid)
        tracked = trail.versions.get(vid)
        if tracked is None:
            yield Disagreement("data version", vid, "no event records its upload")
            continue
        for name, value in (("original_sha256", original), ("canonical_sha256", canonical)):
            if tracked.values.get(name) != value:
                yield Disagreement("data version", vid, f"its {name} is not the one recorded "
                                                        "at upload", tracked.seq)
    for vid, tracked in sorted(trail.versions.items()):
        if vid not in present:
            yield Disagreement("data version", vid, "the trail records its upload but the "
                                                    "table has no such row (deleted)",
                               tracked.seq)


def _confirmations(session: Session, trail: Trail) -> Iterator[Disagreement]:
    present = set()
    for run in session.scalars(select(ConfirmationRun).order_by(ConfirmationRun.id)):
        present.add(run.id)
        tracked = trail.confirmations.get(run.id)
        if tracked is None:
            yield Disagreement("confirmation run", run.id, "no event records it")
            continue
        digest = record_sha256(run)
        recorded = tracked.values
        verdict = (_loads(run.results_json) or {}).get("verdict")
        problems = []
        if recorded.get("setpoint_id") != run.setpoint_id:
            problems.append("it belongs to another setpoint proposal than recorded")
        if recorded.get("original_sha256") != run.original_sha256:
            problems.append("its file's SHA-256 is not the one recorded")
        if recorded.get("record_sha256") not in (None, digest):
            problems.append("its results are not the ones recorded")
        if recorded.get("verdict") != verdict:
            problems.append(f"its verdict '{verdict}' is not the recorded "
                            f"'{recorded.get('verdict')}'")
        for problem in problems:
            yield Disagreement("confirmation run", run.id, problem, tracked.seq)
        yield from _seal(session, "confirmation", digest, run, tracked, "confirmation run",
                         run.id)
    for rid, tracked in sorted(trail.confirmations.items()):
        if rid not in present:
            yield Disagreement("confirmation run", rid, "the trail records it but the table "
                                                        "has no such row (deleted)", tracked.seq)


def disagreements(session: Session) -> list[Disagreement]:
    """Replay the stored trail and compare it with the tables."""
    return compare(session, read_trail(stored_events(session)))


def verified_replay(session: Session) -> tuple[audit.ChainReport, list[Disagreement]]:
    """:func:`app.store.audit.verify` and :func:`disagreements` in one reading of the trail.

    Returns
    -------
    tuple
        The chain's report and every disagreement between the tables and the trail, each as
        the two functions give them.
    """
    trail = Trail()
    report = audit.verify(session, observe=trail.feed, wants=Trail.reads)
    return report, compare(session, trail)


def object_events(session: Session, kind: str, object_id: int) -> list[dict[str, Any]]:
    """The stored events about one fit or setpoint proposal, in order."""
    table = AuditEvent.__table__
    query = (select(*(table.c[name] for name in EVENT_COLUMNS))
             .where(table.c.object_type == kind, table.c.object_id == str(object_id))
             .order_by(table.c.seq))
    out = []
    for row in session.execute(query):
        ev = dict(zip(EVENT_COLUMNS, row, strict=True))
        ev["at"] = iso(ev["at"])
        out.append(ev)
    return out


def fit_disagreements(session: Session, fit: Fit) -> list[Disagreement]:
    """The replay for one fit, cheap enough for every page that shows it: its own events (each
    checked against its hash and seal; the chain as a whole is :func:`app.store.audit.verify`'s
    job), its row and its signatures."""
    cache = session.info.setdefault("plumbline_fit_replay", {})
    key = (fit.id, fit.row_version, fit.state)
    if key in cache:
        return cache[key]
    events = object_events(session, "fit", fit.id)
    out = [Disagreement("fit", fit.id, f"its event is {problem}", ev["seq"])
           for ev in events for problem in _event_problems(session, ev, bool(fit.seal))]
    trail = read_trail(events)
    out.extend(_signed_object(session, "fit", fit, fit.snapshot_sha256,
                              fit_snapshot_sha256(fit), trail))
    rows = {sig.id for sig in fit.signatures}
    for sig in fit.signatures:
        out.extend(_signature(session, sig, trail))
    for sid, tracked in sorted(trail.signatures.items()):
        if sid not in rows:
            out.append(Disagreement("signature", sid, f"the trail records it on fit {fit.id} but "
                                                      "it is missing (deleted)", tracked.seq))
    cache[key] = out
    return out


def _event_problems(session: Session, ev: dict[str, Any], sealed_object: bool) -> list[str]:
    """An object created under a seal has only sealed events."""
    if event_hash(ev) != ev["hash"]:
        return ["altered (its content does not match its hash)"]
    state = keys.seal_state(session, "event", ev["hash"], ev["key_id"], ev["seal"])
    if state in (keys.BROKEN, keys.KEY_NOT_HELD) or (state == keys.UNSEALED and sealed_object):
        return ["not sealed by the integrity key: " + keys.SEAL_PROBLEMS[state]]
    return []
