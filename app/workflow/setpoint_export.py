"""The setpoint sheet as JSON and CSV: settings, predictions, fits, signatures, caution.

Both carry the fit ids with their snapshot hashes, the proposal's own hash, every signature
(printed name, UTC time, meaning) with its current validity, the confirmation verdicts, the
audit chain head at export time and the caution text (DESIGN.md "Where this can hurt someone").
"""

from __future__ import annotations

import csv
import io
from typing import Any

from sqlalchemy.orm import Session

from app.analysis.optimize import CAUTION
from app.analysis.rounding import round_to, setting_text
from app.store import audit
from app.store.models import SetpointProposal
from app.workflow import confirmations
from app.workflow.csvsafe import neutralise
from app.workflow.fits import results_of as fit_results_of
from app.workflow.reviews import APPROVE, check_signature
from app.workflow.setpoint_signoff import for_production, state_label, tolerance_of
from app.workflow.setpoints import (
    fits_of,
    goals_of,
    held_factors,
    proposal_intact,
    release_signatures,
    resolution_of,
    result_of,
    signature_json,
)

# A spreadsheet treats a cell starting with one of these as a formula (OWASP "CSV injection").


def _when(moment) -> str | None:
    return None if moment is None else moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def units_of(fits: list) -> dict[str, str | None]:
    """Each factor's units as the fits state them."""
    if not fits:
        return {}
    return {f["name"]: f.get("units") for f in fit_results_of(fits[0])["model"]["factors"]}


def goal_words(goal: dict[str, Any]) -> str:
    """A stored goal in a few words (proposals stored before the goals were renamed keep
    ``low``/``high`` and ``in_range``)."""
    kind = goal.get("goal")
    lower = goal.get("lower", goal.get("low"))
    upper = goal.get("upper", goal.get("high"))

    def num(v):
        return "—" if v is None else f"{v:.6g}"

    if kind == "maximize":
        return f"as high as possible (acceptable from {num(lower)}, fully from {num(upper)})"
    if kind == "minimize":
        return f"as low as possible (fully at {num(lower)}, acceptable up to {num(upper)})"
    if kind == "target":
        return (f"hit {num(goal.get('target'))} (acceptable {num(lower)} to {num(upper)})")
    if kind in ("within", "in_range"):
        return f"kept within {num(lower)} to {num(upper)}"
    return str(kind)


def export_json(session: Session, proposal: SetpointProposal) -> dict[str, Any]:
    """The setpoint sheet as one JSON-able document."""
    result = result_of(proposal)
    fits = fits_of(session, proposal)
    seq, head = audit.chain_head(session)
    return {
        "caution": CAUTION,
        "setpoint_id": proposal.id, "study_id": proposal.study_id,
        "study_title": proposal.study.title, "state": proposal.state,
        "state_label": state_label(proposal.state),
        "for_production": for_production(proposal),
        "row_version": proposal.row_version,
        "units": units_of(fits), "resolution": resolution_of(session, proposal),
        "created_by": proposal.created_by.full_name, "created_at": _when(proposal.created_at),
        "snapshot_sha256": proposal.snapshot_sha256,
        "snapshot_intact": proposal_intact(session, proposal),
        "fits": [{"id": f.id, "response": f.response, "state": f.state,
                  "data_version": f.data_version.version, "snapshot_sha256": f.snapshot_sha256,
                  "approvals": [{"printed_name": s.printed_name, "signer": s.signer.username,
                                 "signed_at": _when(s.signed_at),
                                 "meaning": s.meaning, "status": check_signature(f, s).status}
                                for s in f.signatures if s.meaning == APPROVE]}
                 for f in fits],
        "goals": goals_of(proposal),
        "optimum": result["optimum"], "constraints": result.get("constraints") or {},
        "stationary_point": result["stationary_point"],
        "region": result["region"], "grid_check": result["grid_check"],
        "levels": result.get("levels"),
        "edge": result.get("edge"),
        "held": held_factors(proposal),
        "tolerance": tolerance_of(session, proposal),
        "signatures": [signature_json(session, proposal, s)
                       for s in release_signatures(session, proposal)],
        "confirmations": [{"id": run.id, "filename": run.filename,
                           "original_sha256": run.original_sha256,
                           "created_at": _when(run.created_at),
                           "created_by": run.created_by.full_name,
                           **confirmations.results_of(run)}
                          for run in proposal.confirmations],
        "chain_head": {"seq": seq, "hash": head},
    }


def export_csv(session: Session, proposal: SetpointProposal) -> bytes:
    """The setpoint sheet as CSV sections (caution first), every text cell neutralised."""
    doc = export_json(session, proposal)
    opt = doc["optimum"]
    rows: list[list[Any]] = [
        ["caution", CAUTION],
        ["setpoint proposal", doc["setpoint_id"]],
        ["study", doc["study_id"], doc["study_title"]],
        ["state", doc["state_label"],
         "for production use" if doc["for_production"] else "NOT for production use"],
        ["proposed by", doc["created_by"], doc["created_at"]],
        ["snapshot sha256", doc["snapshot_sha256"],
         "intact" if doc["snapshot_intact"] else "ALTERED"],
        ["chain head", doc["chain_head"]["seq"], doc["chain_head"]["hash"]],
        *([["on the edge of the region searched", doc["edge"]["note"]]] if doc["edge"] else []),
        [],
        ["factor", "setting", "units", "resolution (from the data)", "setting (full value)",
         "setting (coded units)", "fixed by the engineer"],
    ]
    units, step = doc["units"], doc["resolution"]
    rows += [[name, setting_text(opt["settings"][name], step.get(name)), units.get(name) or "",
              step.get(name) or "", opt["settings"][name], opt["coded"][name],
              "fixed" if name in doc["held"] else ""]
             for name in opt["settings"]]
    if doc.get("levels"):
        rows += [[], ["levels compared", doc["levels"]["statement"]],
                 ["levels", "chosen", *opt["predicted"], "overall desirability D"]]
        rows += [[", ".join(f"{n} = {v}" for n, v in item["levels"].items()),
                  "chosen" if item["chosen"] else "", *item["predicted"].values(),
                  item["desirability"]] for item in doc["levels"]["by_level"]]
    rows += [[], ["response", "predicted", "95% CI low", "95% CI high", "95% PI low",
                  "95% PI high", "desirability d"]]
    each = opt.get("individual_desirability") or {}
    for response, value in opt["predicted"].items():
        ci, pi = opt["ci"][response], opt["pi"][response]
        r = step.get(response)
        rows.append([response, round_to(value, r), round_to(ci[0], r), round_to(ci[1], r),
                     round_to(pi[0], r), round_to(pi[1], r), each.get(response, "")])
    rows += [["overall desirability D", opt["desirability"]]]
    if doc["constraints"]:
        rows += [[], ["kept within limits", "lower", "upper", "predicted", "met"]]
        rows += [[response, c["lower"], c["upper"], c["predicted"],
                  "met" if c["met"] else "NOT met"] for response, c in doc["constraints"].items()]
    rows += [[],
             ["fit id", "response", "data version", "snapshot sha256", "approved by",
              "user name", "approved at (UTC)", "meaning"]]
    for fit in doc["fits"]:
        approval = fit["approvals"][-1] if fit["approvals"] else {}
        rows.append([fit["id"], fit["response"], fit["data_version"], fit["snapshot_sha256"],
                     approval.get("printed_name"), approval.get("signer"),
                     approval.get("signed_at"),
                     approval.get("meaning")])
    rows += [[], ["signed by", "user name", "signed at (UTC)", "meaning", "comment", "status",
                  "manifest sha256"]]
    rows += [[s["printed_name"], s["signer"], s["signed_at"], s["meaning"], s["comment"],
              s["status"], s["manifest_sha256"]] for s in doc["signatures"]] or [["not signed"]]
    # The verdict comes from the judged mean of m runs against the interval for the mean
    # (empty for runs recorded before that rule); the single-run PI is information.
    rows += [[], ["confirmation", "file", "response", "observed", "95% PI low", "95% PI high",
                  "verdict", "m", "judged mean", "interval for the mean low",
                  "interval for the mean high", "rule"]]
    for run in doc["confirmations"]:
        for response, v in run["responses"].items():
            mean_low, mean_high = (v.get("interval_for_mean") or [None, None])[:2]
            rows.append([run["id"], run["filename"], response,
                         " ".join(f"{x:g}" for x in v["observed"]), v["pi"][0], v["pi"][1],
                         v["verdict"], v.get("m"), v.get("judged_mean"), mean_low, mean_high,
                         run.get("rule")])
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    for row in rows:
        writer.writerow([neutralise(c) for c in row])
    return out.getvalue().encode("utf-8")
