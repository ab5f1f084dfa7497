"""Setpoints from approved fits only: propose, release (signed), confirmation runs.

States::

    draft ─release (signed "released for production use")─▶ released ─▶ withdrawn

A proposal is made from one approved fit per response of one study. Every step re-checks that
each fit is still approved, that its approval still applies (no newer data version) and that its
signature is still bound to the snapshot; when one does not hold, the caller gets
:class:`~app.workflow.Conflict` (HTTP 409) with a plain message. Release follows the signing
rules of app.workflow.signing (the password again, checked before the write; separation of
duties; audited refusals), a conditional update on (state, row_version), and a signature that
stores the proposal's snapshot SHA-256 and a manifest hash. Each step appends its audit event in
the same transaction.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session, joinedload

from app.analysis import AnalysisError
from app.analysis.optimize import CAUTION, OutsideRegion, SetpointError
from app.analysis.optimize import propose as search_setpoint
from app.store import audit, keys
from app.store.audit import canonical_json
from app.store.keys import sealing_ring
from app.store.models import Fit, SetpointProposal, Signature, User
from app.workflow import Conflict, NotFound, WorkflowError, in_id_range, signing, teams
from app.workflow.fits import results_of
from app.workflow.reviews import APPROVE, check_signature
from app.workflow.signing import (
    INVALID,
    NOT_APPLYING,
    VALID,
    Reauthenticated,
    SignatureCheck,
    SignatureRefused,
    clean_comment,
    manifest_sha256,
    require_role,
    signature_summary,
)

RELEASE = "released for production use"
RELEASE_MEANINGS = (RELEASE,)
GOAL_FIELDS = ("goal", "target", "low", "high", "weight", "importance")

__all__ = ["CAUTION", "RELEASE", "SignatureRefused", "attempt", "fit_problem", "get_proposal",
           "manifest_sha256", "propose", "proposal_intact", "release", "release_signatures",
           "signature_check", "signature_summary", "snapshot_sha256"]


def attempt(proposal_id: int) -> signing.Attempt:
    """What a refused release of ``proposal_id`` is recorded as."""
    return signing.Attempt(doing="release", object_type="setpoint", object_id=proposal_id)


# ---- the fits a proposal may come from ----------------------------------------------------

def fit_problem(fit: Fit) -> str | None:
    """Why ``fit`` may not drive setpoints now, in one plain sentence; None when it may."""
    if fit.state == "superseded":
        return (f"Fit {fit.id} ({fit.response}) was superseded by a newer approved fit; "
                "use that one.")
    if fit.state == "withdrawn":
        return f"Fit {fit.id} ({fit.response}) was withdrawn from use."
    if fit.state != "approved":
        return (f"Fit {fit.id} ({fit.response}) is {fit.state}, not approved; only an approved "
                "fit may drive setpoints.")
    approvals = [s for s in fit.signatures if s.meaning == APPROVE]
    if not approvals:
        return f"Fit {fit.id} ({fit.response}) has no approval signature."
    check = check_signature(fit, approvals[-1])
    if check.status == NOT_APPLYING:
        return f"The approval of fit {fit.id} ({fit.response}) no longer applies: {check.reason}."
    if check.status != VALID:
        return (f"The approval signature of fit {fit.id} ({fit.response}) is invalid: "
                f"{check.reason}.")
    return None


def _guard(fits: list[Fit]) -> None:
    for fit in fits:
        problem = fit_problem(fit)
        if problem:
            raise Conflict(problem, field="fits")


def _check_fit_set(fits: list[Fit]) -> None:
    if not fits:
        raise WorkflowError("Choose at least one approved fit.", field="fits")
    studies = {f.study_id for f in fits}
    if len(studies) > 1:
        raise WorkflowError("The fits must all come from the same study.", field="fits")
    seen: dict[str, int] = {}
    for fit in fits:
        if fit.response in seen:
            raise WorkflowError(f"Fits {seen[fit.response]} and {fit.id} both model "
                                f"'{fit.response}'; choose one fit per response.", field="fits")
        seen[fit.response] = fit.id


# ---- inputs --------------------------------------------------------------------------------

def _spec_limit(value: Any, response: str, name: str) -> float | None:
    if value is None or value == "":
        return None
    if isinstance(value, bool):
        raise WorkflowError(f"Specification {name} limit of '{response}' must be a number.",
                            field=f"goals.{response}.spec.{name}")
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise WorkflowError(f"Specification {name} limit of '{response}' must be a number "
                            f"(got {value!r}).", field=f"goals.{response}.spec.{name}") from None
    if not math.isfinite(number):
        raise WorkflowError(f"Specification {name} limit of '{response}' must be finite.",
                            field=f"goals.{response}.spec.{name}")
    return number


def split_goals(goals: Any, responses: list[str]) -> tuple[dict, dict]:
    """(search goals, specification limits) from ``{response: {goal…, spec: {lower, upper}}}``.

    The specification limits are optional per response and feed the design-space map only.
    """
    if not isinstance(goals, dict) or not goals:
        raise WorkflowError("Give a goal for at least one response.", field="goals")
    search, specs = {}, {}
    for response, spec in goals.items():
        if response not in responses:
            raise WorkflowError(f"Goal names response '{response}', which none of the chosen "
                                f"fits models ({', '.join(responses)}).", field="goals")
        if not isinstance(spec, dict):
            raise WorkflowError(f"Goal for '{response}' must be an object.",
                                field=f"goals.{response}")
        limits = spec.get("spec") or {}
        if not isinstance(limits, dict) or set(limits) - {"lower", "upper"}:
            raise WorkflowError(f"Specification limits of '{response}' are {{lower, upper}}.",
                                field=f"goals.{response}.spec")
        lower = _spec_limit(limits.get("lower"), response, "lower")
        upper = _spec_limit(limits.get("upper"), response, "upper")
        if lower is not None and upper is not None and not lower < upper:
            raise WorkflowError(f"Specification lower limit of '{response}' must be below its "
                                "upper limit.", field=f"goals.{response}.spec.lower")
        if lower is not None or upper is not None:
            specs[response] = {"lower": lower, "upper": upper}
        search[response] = {k: v for k, v in spec.items() if k != "spec" and v is not None}
    return search, specs


def _finite(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None (the hash refuses NaN)."""
    if isinstance(value, dict):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if hasattr(value, "item"):  # numpy scalars
        return _finite(value.item())
    return value


# ---- the proposal's snapshot -----------------------------------------------------------------

def snapshot_document(proposal: SetpointProposal, fits: list[Fit]) -> dict[str, Any]:
    """What a proposal's SHA-256 covers: inputs, result, and the fits' snapshot hashes."""
    return {"study_id": proposal.study_id,
            "fits": [{"id": f.id, "response": f.response, "snapshot_sha256": f.snapshot_sha256}
                     for f in fits],
            "goals": json.loads(proposal.goals_json), "bounds": json.loads(proposal.bounds_json),
            "fixed": json.loads(proposal.fixed_json), "result": json.loads(proposal.result_json)}


def fits_of(session: Session, proposal: SetpointProposal) -> list[Fit]:
    ids = json.loads(proposal.fit_ids_json)
    found = {f.id: f for f in session.scalars(select(Fit).where(Fit.id.in_(ids)))}
    return [found[i] for i in ids if i in found]


def snapshot_sha256(session: Session, proposal: SetpointProposal) -> str:
    doc = snapshot_document(proposal, fits_of(session, proposal))
    return hashlib.sha256(canonical_json(doc).encode()).hexdigest()


def proposal_intact(session: Session, proposal: SetpointProposal) -> bool:
    return snapshot_sha256(session, proposal) == proposal.snapshot_sha256


def get_proposal(session: Session, proposal_id: int) -> SetpointProposal:
    proposal = (session.get(SetpointProposal, proposal_id) if in_id_range(proposal_id)
                else None)
    if proposal is None:
        raise NotFound(f"No setpoint proposal {proposal_id}.", field="setpoint")
    return proposal


def proposals_of_study(session: Session, study_id: int) -> list[SetpointProposal]:
    return list(session.scalars(select(SetpointProposal)
                                .where(SetpointProposal.study_id == study_id)
                                .options(joinedload(SetpointProposal.created_by))
                                .order_by(SetpointProposal.id.desc())))


def goals_of(proposal: SetpointProposal) -> dict[str, Any]:
    return json.loads(proposal.goals_json)


def result_of(proposal: SetpointProposal) -> dict[str, Any]:
    return json.loads(proposal.result_json)


# ---- propose ---------------------------------------------------------------------------------

def propose(session: Session, actor: User, fits: list[Fit], goals: dict, bounds: dict | None,
            fixed: dict | None) -> SetpointProposal:
    """Search the design region of approved fits and store the proposal with its hash.

    ``goals`` is ``{response: {goal, target, low, high, weight, importance, spec: {lower,
    upper}}}``; ``bounds`` {factor: [low, high]} and ``fixed`` {factor: value} are in actual
    units. Raises Conflict (409) when a fit may not drive setpoints or a bound or fixed value
    leaves the design region, WorkflowError naming the field for other bad input.
    """
    require_role(actor, "engineer", "propose setpoints")
    for study in {f.study_id: f.study for f in fits}.values():
        teams.require_act(session, actor, study, "propose setpoints in it")
    _check_fit_set(fits)
    _guard(fits)
    responses = [f.response for f in fits]
    search_goals, specs = split_goals(goals, responses)
    try:
        result = search_setpoint({f.response: results_of(f) for f in fits}, search_goals,
                                 bounds=bounds or None, fixed=fixed or None)
    except OutsideRegion as exc:
        raise Conflict(f"The request leaves the design region: {exc}.",
                       field=exc.field or "bounds") from None
    except SetpointError as exc:
        raise WorkflowError(f"{exc}.", field=exc.field or "goals") from None
    except AnalysisError as exc:
        raise WorkflowError(f"{exc}.", field="fits") from None
    stored_goals = {r: {**search_goals[r], **({"spec": specs[r]} if r in specs else {})}
                    for r in search_goals}
    proposal = SetpointProposal(
        study_id=fits[0].study_id, fit_ids_json=canonical_json([f.id for f in fits]),
        goals_json=canonical_json(stored_goals), bounds_json=canonical_json(bounds or {}),
        fixed_json=canonical_json(fixed or {}), result_json=canonical_json(_finite(result)),
        snapshot_sha256="", state="draft", row_version=1, created_by_id=actor.id)
    proposal.snapshot_sha256 = hashlib.sha256(canonical_json(
        snapshot_document(proposal, fits)).encode()).hexdigest()
    proposal.key_id, proposal.seal = sealing_ring(session).seal("setpoint",
                                                                proposal.snapshot_sha256)
    session.add(proposal)
    session.flush()
    optimum = result["optimum"]
    audit.record(session, actor=actor, action="setpoint.propose", object_type="setpoint",
                 object_id=proposal.id, study_id=proposal.study_id,
                 new={"fits": [f.id for f in fits], "goals": stored_goals,
                      "bounds": bounds or {}, "fixed": fixed or {},
                      "settings": _finite(optimum["settings"]),
                      "desirability": _finite(optimum["desirability"]),
                      "snapshot_sha256": proposal.snapshot_sha256})
    return proposal


# ---- release ---------------------------------------------------------------------------------

def release_signatures(session: Session, proposal: SetpointProposal) -> list[Signature]:
    return list(session.scalars(select(Signature).where(Signature.setpoint_id == proposal.id)
                                .order_by(Signature.id)))


def signature_check(session: Session, proposal: SetpointProposal,
                    sig: Signature) -> SignatureCheck:
    """Valid while the manifest and the proposal's stored snapshot still hash as signed."""
    if manifest_sha256(sig) != sig.manifest_sha256:
        return SignatureCheck(INVALID, "the signature's own record was altered")
    seal = keys.seal_state(session, "signature", sig.manifest_sha256, sig.key_id, sig.seal)
    if seal in (keys.BROKEN, keys.KEY_NOT_HELD) or (seal == keys.UNSEALED and proposal.seal):
        return SignatureCheck(INVALID, "the signature's record is not sealed by the integrity "
                                       "key (" + keys.SEAL_PROBLEMS[seal] + ")")
    if sig.setpoint_id != proposal.id or sig.snapshot_sha256 != proposal.snapshot_sha256:
        return SignatureCheck(INVALID, "it names a different snapshot than this proposal's")
    if snapshot_sha256(session, proposal) != sig.snapshot_sha256:
        return SignatureCheck(INVALID, "the proposal's stored snapshot no longer matches what "
                                       "was signed")
    return SignatureCheck(VALID, "the signed setpoint sheet is unchanged")


def _check_current(session: Session, proposal: SetpointProposal, doing: str) -> None:
    if not proposal_intact(session, proposal):
        raise Conflict(f"Setpoint proposal {proposal.id} no longer matches its recorded SHA-256, "
                       f"so it cannot be {doing}; report this to the auditor.", field="setpoint")
    _guard(fits_of(session, proposal))


def release(session: Session, actor: User, proposal: SetpointProposal, *,
            proof: Reauthenticated | None, meaning: str = RELEASE, comment: str | None = None,
            expected_row_version: int | None = None) -> Signature:
    """An approver signs the setpoint sheet (draft → released).

    ``proof`` is the password check made before this transaction
    (:func:`app.workflow.signing.signed` runs the sequence). Raises SignatureRefused (proof,
    lock), Forbidden (role, separation of duties), Conflict (not a draft, changed meanwhile,
    altered snapshot, a fit no longer approved), WorkflowError (meaning, comment).
    """
    signing.accept(session, actor, proof)
    require_role(actor, "approver", "release setpoints")
    if meaning not in RELEASE_MEANINGS:
        raise WorkflowError(f"Choose the meaning {RELEASE!r} to release setpoints.",
                            field="meaning")
    comment = clean_comment(comment)
    signing.check_releaser(actor, proposal, fits_of(session, proposal))
    if proposal.state != "draft":
        raise Conflict(f"Setpoint proposal {proposal.id} is {proposal.state}; only a draft "
                       "proposal can be released.", field="state")
    version = proposal.row_version
    if expected_row_version is not None and expected_row_version != version:
        raise Conflict(f"Setpoint proposal {proposal.id} changed since you opened it; reload "
                       "it and look again.", field="row_version")
    _check_current(session, proposal, "released")
    moved = session.execute(
        update(SetpointProposal)
        .where(SetpointProposal.id == proposal.id, SetpointProposal.state == "draft",
               SetpointProposal.row_version == version)
        .values(state="released", row_version=version + 1)
        .execution_options(synchronize_session=False))
    if moved.rowcount != 1:
        raise Conflict(f"Setpoint proposal {proposal.id} was changed by someone else a moment "
                       "ago; reload it and look again.", field="row_version")
    session.refresh(proposal)
    sig = signing.add_signature(session, actor, meaning=meaning, comment=comment,
                                snapshot_sha256=proposal.snapshot_sha256,
                                setpoint_id=proposal.id)
    audit.record(session, actor=actor, action="setpoint.release", object_type="setpoint",
                 object_id=proposal.id, study_id=proposal.study_id,
                 old={"state": "draft", "row_version": version},
                 new={"state": "released", "row_version": proposal.row_version,
                      "signature": signature_summary(sig)}, reason=comment or None)
    return sig


def signature_json(session: Session, proposal: SetpointProposal,
                   sig: Signature) -> dict[str, Any]:
    check = signature_check(session, proposal, sig)
    return {**signature_summary(sig), "status": check.status, "status_reason": check.reason}
