"""PDF reports: the fit report (with its signatures) and the setpoint sheet.

Each report is HTML from ``templates/reports/`` laid out for print by WeasyPrint
(``static/css/report.css``: A4 pages whose margins carry the study, the fit or sheet number,
"page x of y" and the short snapshot hash; the full hash is in the body). Charts are the very
Vega-Lite specs the pages draw, handed in by the caller (the web layer builds them, binned
beyond 5,000 runs) and rendered to SVG by vl-convert, embedded as ``data:`` URIs.

Everything a report states about validity is worked out when it is printed: whether the
snapshot still hashes to its recorded value, each signature's status with its reason, and the
audit chain head (the value appended to the anchor file outside the database), so a printout
can be compared with a copy of the anchor kept elsewhere.

The functions read through the caller's session and return bytes; nothing is written.
WeasyPrint fetches nothing but ``data:`` URIs, so text in a study cannot make the renderer read
a file or a URL.
"""

from __future__ import annotations

import base64
import hashlib
import json
from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from functools import cache
from typing import Any, Protocol

from jinja2 import Environment, FileSystemLoader, select_autoescape
from sqlalchemy import select
from sqlalchemy.orm import Session

from app import STATIC, TEMPLATES
from app.analysis.rounding import round_to, setting_text
from app.caches import MB, ByteCache
from app.store import audit
from app.store.base import utcnow
from app.store.models import Fit, SetpointProposal, Study
from app.workflow import fits as fit_service
from app.workflow import setpoint_export, setpoints
from app.workflow.reviews import signatures_json

PDF = "application/pdf"
# Rendering a chart costs far more than the rest of a page; the same spec gives the same SVG.
_SVG_CACHE = ByteCache(32 * MB)
STYLESHEET = STATIC / "css" / "report.css"
REPORT_FONT = "DejaVu Sans"  # static/css/report.css sets the same; CI installs fonts-dejavu-core


class ChartLike(Protocol):
    """What a report needs of a chart (``app.web.charts.Chart`` has it)."""

    name: str
    title: str
    spec: dict[str, Any]
    note: str


def short_hash(value: str | None) -> str:
    return (value or "")[:12]


def utc_text(moment: datetime | str | None) -> str:
    """A UTC time as the pages print it: ``2026-01-31 14:05:09 UTC``."""
    if moment is None:
        return ""
    if isinstance(moment, str):  # the ISO form signatures are stored in (…Z)
        moment = datetime.fromisoformat(moment.replace("Z", "+00:00"))
    return moment.strftime("%Y-%m-%d %H:%M:%S UTC")


def chart_svg(spec: dict[str, Any]) -> str:
    """The SVG of a Vega-Lite spec, kept by the spec's SHA-256.

    Text is set in the report's own font: vl-convert measures labels with the font the spec
    names and WeasyPrint draws them with the one fontconfig finds, so a generic "sans-serif"
    could be measured narrow and drawn wide, and a legend title run off the chart's edge.
    """
    spec = {**spec, "config": {**spec.get("config", {}), "font": REPORT_FONT}}
    text = json.dumps(spec, sort_keys=True, default=str)
    key = ("svg", hashlib.sha256(text.encode()).hexdigest())
    found = _SVG_CACHE.get(key)
    if found is None:
        import vl_convert

        found = vl_convert.vegalite_to_svg(spec)
        _SVG_CACHE.put(key, found)
    return found


def svg_uri(spec: dict[str, Any]) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(chart_svg(spec).encode()).decode()


@cache
def _environment() -> Environment:
    env = Environment(loader=FileSystemLoader(str(TEMPLATES)),
                      autoescape=select_autoescape(["html"]), trim_blocks=True,
                      lstrip_blocks=True)
    env.filters.update(utc=utc_text, round_to=round_to, setting=setting_text,
                       short_hash=short_hash, svg_uri=svg_uri)
    env.globals["goal_words"] = setpoint_export.goal_words
    return env


def url_fetcher() -> Any:
    """WeasyPrint's fetcher limited to ``data:`` URIs (the embedded charts): a report reads no
    file and no URL, whatever a study's text holds."""
    from weasyprint.urls import URLFetcher

    return URLFetcher(allowed_protocols=("data",))


def render_pdf(template: str, **context: Any) -> bytes:
    """``templates/<template>`` rendered to PDF bytes."""
    from weasyprint import CSS, HTML

    html = _environment().get_template(template).render(**context)
    return HTML(string=html, url_fetcher=url_fetcher()).write_pdf(
        stylesheets=[CSS(filename=str(STYLESHEET))])


def _chain_head(session: Session) -> dict[str, Any]:
    seq, head = audit.chain_head(session)
    return {"seq": seq, "hash": head}


def _printed(session: Session, printed_by: str | None, software_version: str) -> dict[str, Any]:
    return {"printed_at": utcnow(), "printed_by": printed_by,
            "software_version": software_version, "chain_head": _chain_head(session)}


def fit_context(session: Session, fit: Fit, charts: Sequence[ChartLike]) -> dict[str, Any]:
    """What the fit report shows: the snapshot with each check beside its chart, the
    exclusions with their reasons, and the signatures with their validity now."""
    results = fit_service.results_of(fit)
    by_name = {c.name: c for c in charts}
    shown: set[str] = set()
    checks = []
    for check in results["checks"]:
        chart = by_name.get(check.get("chart"))
        if chart is not None and chart.name in shown:
            checks.append({"check": check, "chart": None, "chart_above": chart.title})
            continue
        if chart is not None:
            shown.add(chart.name)
        checks.append({"check": check, "chart": chart, "chart_above": None})
    return {
        "fit": fit, "study": fit.study, "version": fit.data_version, "results": results,
        "thresholds": json.loads(fit.thresholds_json),
        "snapshot": fit.snapshot_sha256, "intact": fit_service.snapshot_intact(fit),
        "exclusions": [{"row": row, "reason": reason}
                       for row, reason in results["spec"].get("exclusions") or []],
        "checks": checks, "other_charts": [c for c in charts if c.name not in shown],
        "signatures": signatures_json(fit),
    }


def fit_report(session: Session, fit: Fit, *, charts: Sequence[ChartLike],
               software_version: str, printed_by: str | None = None) -> bytes:
    """The fit report as PDF bytes; ``charts`` are the fit page's charts."""
    return render_pdf("reports/fit.html", **fit_context(session, fit, charts),
                      **_printed(session, printed_by, software_version))


def setpoint_context(session: Session, proposal: SetpointProposal) -> dict[str, Any]:
    """What the setpoint sheet shows: the export document (caution, settings, predictions,
    signatures with their validity, confirmations) in the fits' own factor order."""
    doc = setpoint_export.export_json(session, proposal)
    return {"doc": doc, "proposal": proposal, "study": proposal.study,
            "snapshot": doc["snapshot_sha256"], "intact": doc["snapshot_intact"],
            "caution": doc["caution"],
            "factor_names": setpoints.factor_order(session, proposal),
            "result": setpoints.result_of(proposal)}


def setpoint_sheet(session: Session, proposal: SetpointProposal, *, software_version: str,
                   printed_by: str | None = None) -> bytes:
    """The setpoint sheet as PDF bytes, its caution on every page."""
    return render_pdf("reports/setpoints.html", **setpoint_context(session, proposal),
                      **_printed(session, printed_by, software_version))


def plan_sheet(session: Session, plan: Any, *, software_version: str,
               printed_by: str | None = None) -> bytes:
    """A plan's run sheet as PDF bytes: run order, label, settings with units, blank
    responses, the seed and the plan's hash on every page."""
    from app.workflow import plans

    header, rows = plans.sheet_rows(plan)
    return render_pdf("reports/plan.html", plan=plan, study=plan.study,
                      built=plans.document(plan), header=header, rows=rows,
                      snapshot=plan.sha256, intact=plans.plan_intact(plan),
                      **_printed(session, printed_by, software_version))


def study_reports(session: Session, study: Study, *,
                  charts_of: Callable[[Fit], Sequence[ChartLike]],
                  software_version: str) -> Mapping[str, bytes]:
    """Every fit report and setpoint sheet of ``study``, by their path in the record package."""
    out: dict[str, bytes] = {}
    for fit in session.scalars(select(Fit).where(Fit.study_id == study.id).order_by(Fit.id)):
        out[f"fits/{fit.id}/report.pdf"] = fit_report(
            session, fit, charts=charts_of(fit), software_version=software_version)
    for proposal in session.scalars(select(SetpointProposal)
                                    .where(SetpointProposal.study_id == study.id)
                                    .order_by(SetpointProposal.id)):
        out[f"setpoints/{proposal.id}/report.pdf"] = setpoint_sheet(
            session, proposal, software_version=software_version)
    return out
