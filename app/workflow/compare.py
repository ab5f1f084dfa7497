"""Comparing result documents: a fit against the previously approved one, and a signed snapshot
against a fresh run of its stored inputs (reproduce)."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

from app.analysis import AnalysisError, FitSpec, analyse
from app.store.models import Fit
from app.workflow import WorkflowError
from app.workflow.uploads import design_table

# Reproduction runs the same code on the same bytes; anything beyond rounding noise is a change.
REPRODUCE_RTOL = 1e-9
REPRODUCE_ATOL = 1e-12


def _coefficients(results: dict[str, Any]) -> dict[str, float | None]:
    return {c["term"]: c.get("estimate") for c in results.get("coefficients", [])}


def _verdicts(results: dict[str, Any]) -> dict[str, str]:
    return {c["id"]: c["verdict"] for c in results.get("checks", [])}


def _exclusions(fit: Fit) -> dict[int, str]:
    return {int(r): why for r, why in json.loads(fit.spec_json).get("exclusions", [])}


def differences(previous: Fit, current: Fit) -> dict[str, Any]:
    """What changed from ``previous`` to ``current``: terms, coefficients, verdicts, exclusions.

    Coefficients are in coded units, so they compare directly when the factors' declared levels
    are the same; both values are shown either way.
    """
    prev_res, cur_res = json.loads(previous.results_json), json.loads(current.results_json)
    prev_terms, cur_terms = prev_res.get("terms", []), cur_res.get("terms", [])
    prev_coef, cur_coef = _coefficients(prev_res), _coefficients(cur_res)
    prev_ver, cur_ver = _verdicts(prev_res), _verdicts(cur_res)
    prev_ex, cur_ex = _exclusions(previous), _exclusions(current)
    coefficient_rows = [
        {"term": t, "previous": prev_coef.get(t), "current": cur_coef.get(t)}
        for t in list(prev_coef) + [t for t in cur_coef if t not in prev_coef]
        if prev_coef.get(t) != cur_coef.get(t)]
    return {
        "previous_fit_id": previous.id,
        "data_versions": [previous.data_version.version, current.data_version.version],
        "terms_added": [t for t in cur_terms if t not in prev_terms],
        "terms_removed": [t for t in prev_terms if t not in cur_terms],
        "coefficients": coefficient_rows,
        "verdicts": [{"check": c, "previous": prev_ver.get(c), "current": cur_ver.get(c)}
                     for c in list(prev_ver) + [c for c in cur_ver if c not in prev_ver]
                     if prev_ver.get(c) != cur_ver.get(c)],
        "exclusions_added": [{"row": r, "reason": cur_ex[r]} for r in sorted(cur_ex)
                             if prev_ex.get(r) != cur_ex[r]],
        "exclusions_removed": [{"row": r, "reason": prev_ex[r]} for r in sorted(prev_ex)
                               if r not in cur_ex],
        "transform": [prev_res.get("transform"), cur_res.get("transform")],
    }


def _close(signed: float | None, today: float | None) -> bool:
    if signed is None or today is None:
        return signed is None and today is None
    if math.isnan(signed) or math.isnan(today):
        return math.isnan(signed) and math.isnan(today)
    return abs(signed - today) <= REPRODUCE_ATOL + REPRODUCE_RTOL * abs(signed)


@dataclass(frozen=True)
class Reproduction:
    fit_id: int
    matches: bool
    terms: list[dict[str, Any]] = field(default_factory=list)
    checks: list[dict[str, Any]] = field(default_factory=list)
    signed_software: str = ""
    problem: str | None = None


def reproduce(fit: Fit) -> Reproduction:
    """Re-run a stored snapshot from its stored inputs and compare with the stored results.

    The inputs are the stored canonical table of the data version (checked against its hash)
    and the stored spec. Coefficients and p-values must agree within a relative 1e-9 (plus an
    absolute 1e-12 for values at zero); verdicts must be identical.
    """
    signed = json.loads(fit.results_json)
    try:
        table = design_table(fit.data_version)
        today = analyse(table.frame, FitSpec.from_dict(json.loads(fit.spec_json))).to_dict()
    except (AnalysisError, WorkflowError, KeyError, ValueError) as exc:
        return Reproduction(fit.id, False, signed_software=fit.software_version,
                            problem=f"the stored inputs could not be run again: {exc}")
    signed_coef, today_coef = _coefficients(signed), _coefficients(today)
    terms = [{"term": t, "signed": signed_coef.get(t), "today": today_coef.get(t),
              "match": t in today_coef and _close(signed_coef.get(t), today_coef.get(t))}
             for t in list(signed_coef) + [t for t in today_coef if t not in signed_coef]]
    signed_checks = {c["id"]: c for c in signed.get("checks", [])}
    today_checks = {c["id"]: c for c in today.get("checks", [])}
    checks = []
    for cid in list(signed_checks) + [c for c in today_checks if c not in signed_checks]:
        a, b = signed_checks.get(cid, {}), today_checks.get(cid, {})
        checks.append({"check": cid, "signed_verdict": a.get("verdict"),
                       "today_verdict": b.get("verdict"), "signed_p": a.get("p_value"),
                       "today_p": b.get("p_value"),
                       "match": bool(a) and bool(b) and a.get("verdict") == b.get("verdict")
                       and _close(a.get("p_value"), b.get("p_value"))})
    matches = all(t["match"] for t in terms) and all(c["match"] for c in checks)
    return Reproduction(fit.id, matches, terms, checks, signed_software=fit.software_version)
