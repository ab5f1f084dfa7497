"""Setpoints from approved fits only: propose, and the guards every later step re-checks.

The sign-off (release for confirmation, confirmation for production, return, withdrawal) is
app.workflow.setpoint_signoff; confirmation runs are app.workflow.confirmations.

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

from sqlalchemy import select
from sqlalchemy.orm import Session, joinedload

from app.analysis import AnalysisError
from app.analysis.optimize import CAUTION, OutsideRegion, SetpointError, refuse_old_words
from app.analysis.optimize import propose as search_setpoint
from app.analysis.rounding import stated_step
from app.store import audit, keys
from app.store.audit import canonical_json
from app.store.keys import sealing_ring
from app.store.models import Fit, SetpointProposal, Signature, User
from app.workflow import Conflict, NotFound, WorkflowError, in_id_range, teams
from app.workflow.digests import fits_of as fits_of
from app.workflow.digests import setpoint_snapshot_document as snapshot_document
from app.workflow.digests import setpoint_snapshot_sha256 as snapshot_sha256
from app.workflow.fits import results_of, search_document
from app.workflow.reviews import APPROVE, check_signature
from app.workflow.setpoint_signoff import MEANINGS as RELEASE_MEANINGS
from app.workflow.setpoint_signoff import RELEASE, attempt, state_label
from app.workflow.signing import (
    INVALID,
    NOT_APPLYING,
    VALID,
    Reauthenticated,
    SignatureCheck,
    SignatureRefused,
    manifest_sha256,
    require_role,
    signature_summary,
)

GOAL_FIELDS = ("goal", "lower", "upper", "target", "shape", "weight")

__all__ = ["CAUTION", "GOAL_FIELDS", "RELEASE", "RELEASE_MEANINGS", "SignatureRefused",
           "attempt",
           "fit_problem", "get_proposal", "manifest_sha256", "propose", "proposal_intact",
           "release", "release_signatures", "signature_check", "signature_summary",
           "snapshot_sha256", "state_label"]


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


def refuse_renamed(goals: Any) -> None:
    """WorkflowError (400) naming ``goals.<response>.<field>`` when a goal uses a word of the
    earlier version (low, high, importance, in_range): 'weight' then meant the shape exponent,
    so such a request is refused with the new name, never guessed at."""
    if not isinstance(goals, dict):
        return
    for response, spec in goals.items():
        try:
            refuse_old_words(str(response), spec)
        except SetpointError as exc:
            raise WorkflowError(f"{exc}.", field=f"goals.{response}.{exc.field}") from None


def split_goals(goals: Any, responses: list[str]) -> tuple[dict, dict]:
    """(search goals, specification limits) from ``{response: {goal…, spec: {lower, upper}}}``.

    The specification limits are optional per response and feed the design-space map only.
    Goal fields are :data:`GOAL_FIELDS`; a word of the earlier version is refused
    (:func:`refuse_renamed`).
    """
    if not isinstance(goals, dict) or not goals:
        raise WorkflowError("Give a goal for at least one response.", field="goals")
    refuse_renamed(goals)
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

    ``goals`` is ``{response: {goal, lower, upper, target, shape, weight, spec: {lower,
    upper}}}`` (goal maximize, minimize, target, or within: keep the response within
    lower/upper); ``bounds`` {factor: [low, high]} and ``fixed`` {factor: value} are in natural
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
        result = search_setpoint({f.response: search_document(f) for f in fits}, search_goals,
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
            tolerance: Any = None, expected_row_version: int | None = None) -> Signature:
    """An approver releases the sheet for confirmation runs (draft → released); the signing
    service is :func:`app.workflow.setpoint_signoff.sign`. Without ``tolerance`` the default
    (:func:`default_tolerance`) is used."""
    from app.workflow import setpoint_signoff

    if tolerance is None:
        tolerance = default_tolerance(session, proposal)
    return setpoint_signoff.sign(session, actor, proposal, meaning=meaning, proof=proof,
                                 comment=comment, tolerance=tolerance,
                                 expected_row_version=expected_row_version)


def factor_order(session: Session, proposal: SetpointProposal) -> list[str]:
    """The factors in the fits' own order (the stored settings have their keys sorted); pages
    and forms that number factors use this order."""
    chosen = fits_of(session, proposal)
    settings = result_of(proposal)["optimum"]["settings"]
    if not chosen:
        return list(settings)
    ordered = [f["name"] for f in results_of(chosen[0])["model"]["factors"]]
    return [n for n in ordered if n in settings] + [n for n in settings if n not in ordered]


def resolution_of(session: Session, proposal: SetpointProposal) -> dict[str, float | None]:
    """Each factor's and response's resolution as the data behind the proposal's fits states
    it (:func:`app.analysis.rounding.stated_step`)."""
    from app.workflow.uploads import design_table

    chosen = fits_of(session, proposal)
    if not chosen:
        return {}
    frame = design_table(chosen[0].data_version).frame
    optimum = result_of(proposal)["optimum"]
    names = [*continuous_settings(proposal), *optimum["predicted"]]
    return {name: stated_step(frame[name].tolist()) if name in frame else None
            for name in names}


def numbered_factors(session: Session, proposal: SetpointProposal) -> list[str]:
    """The continuous factors in the fits' order: those with a tolerance, a gradient and a
    stationary point; forms number their tolerance fields in this order."""
    numeric = set(continuous_settings(proposal))
    return [n for n in factor_order(session, proposal) if n in numeric]


def has_approved_fit(session: Session, study_id: int) -> bool:
    """Whether any fit of the study is in the approved state."""
    return session.scalar(select(Fit.id).where(Fit.study_id == study_id,
                                               Fit.state == "approved").limit(1)) is not None


def held_factors(proposal: SetpointProposal) -> list[str]:
    """The factors the engineer fixed for the search: continuous ones at a value, categorical
    ones at a level."""
    result = result_of(proposal)
    return [*(result.get("region") or {}).get("fixed", {}),
            *(result.get("levels") or {}).get("held", {})]


def continuous_settings(proposal: SetpointProposal) -> list[str]:
    """The factors set by a number, in the stored order; a categorical factor is set by a level
    name and has no tolerance, resolution or gradient."""
    return [n for n, v in result_of(proposal)["optimum"]["settings"].items()
            if not isinstance(v, str)]


# Starting value offered for the tolerance of a confirmation run's settings: this share of the
# factor's studied range (low to high). Common practice, not a standard: the approver sets it.
DEFAULT_TOLERANCE_SHARE = 0.02


def default_tolerance(session: Session, proposal: SetpointProposal) -> dict[str, float]:
    """The starting tolerance per continuous factor: 2 % of its studied range."""
    chosen = fits_of(session, proposal)
    factors = results_of(chosen[0])["model"]["factors"] if chosen else []
    out = {}
    for f in factors:
        low, high = f.get("low"), f.get("high")
        span = (high - low) if low is not None and high is not None else 0.0
        out[f["name"]] = float(f"{abs(span) * DEFAULT_TOLERANCE_SHARE:.4g}")
    return {name: out.get(name, 0.0) for name in continuous_settings(proposal)}


def signature_json(session: Session, proposal: SetpointProposal,
                   sig: Signature) -> dict[str, Any]:
    check = signature_check(session, proposal, sig)
    return {**signature_summary(sig), "status": check.status, "status_reason": check.reason}
