"""Suggestions, never silent changes: what to try next, from the checks and Box–Cox."""

from __future__ import annotations

from .checks.common import CheckResult


def collect_suggestions(checks: list[CheckResult], boxcox: dict, lenth_doc: dict | None,
                        transform: str) -> list[str]:
    out: list[str] = []
    by_id = {c.id: c for c in checks}
    if lenth_doc and lenth_doc.get("saturated"):
        kept = lenth_doc.get("suggested_terms") or []
        if kept:
            out.append("Saturated design: refit with the terms whose effects exceed Lenth's "
                       f"margin of error: {' '.join(kept)}.")
        else:
            out.append("Saturated design: no effect exceeds Lenth's margin of error.")
    sug = boxcox.get("suggestion")
    if sug and sug != "none" and transform == "none":
        out.append("Box-Cox: " + boxcox.get("message", f"try the {sug} transform"))
    curv = by_id.get("curvature")
    if curv and curv.verdict in ("review", "fail"):
        out.append("Curvature shows at the centre points: add axial runs and square terms.")
    for c in checks:
        if c.id.startswith("pattern_factor:") and c.verdict in ("review", "fail"):
            name = c.id.split(":", 1)[1]
            out.append(f"Residuals curve along '{name}': try adding {name}^2.")
    for cid in ("outliers", "influence"):
        c = by_id.get(cid)
        if c and c.runs and c.verdict in ("review", "fail"):
            rows = ", ".join(str(r) for r in c.runs[:10])
            out.append(f"Investigate rows {rows} ({cid}).")
    return out
