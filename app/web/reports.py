"""PDF downloads: the fit report and the setpoint sheet (built by app.workflow.report).

Each PDF is readable by whoever may read the page it prints (the fit page, the setpoint
sheet): signed in, and a member of the study's team or a site-wide reader
(``access.check_team`` looks up the id in the address).
"""

from __future__ import annotations

from collections.abc import Sequence

from flask import Blueprint, current_app, g

from app.store.db import get_session
from app.store.models import Fit, Study
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment
from app.web.fits import fit_charts
from app.workflow import fits, report, setpoints

bp = Blueprint("reports", __name__)


def _software_version() -> str:
    return current_app.config.get("SOFTWARE_VERSION") or ""


def charts_of(fit: Fit) -> Sequence[report.ChartLike]:
    """The fit page's charts (its default contour pair), cached by snapshot hash."""
    return fit_charts(fit, fits.results_of(fit), None)


def fit_pdf_response(fit_id: int):
    session = get_session()
    fit = fits.get_fit(session, fit_id)
    data = report.fit_report(session, fit, charts=charts_of(fit),
                             software_version=_software_version(),
                             printed_by=g.user.full_name)
    return attachment(data, f"fit-{fit.id}-report.pdf", report.PDF)


def setpoint_pdf_response(proposal_id: int):
    session = get_session()
    proposal = setpoints.get_proposal(session, proposal_id)
    data = report.setpoint_sheet(session, proposal, software_version=_software_version(),
                                 printed_by=g.user.full_name)
    return attachment(data, f"setpoints-{proposal.id}-sheet.pdf", report.PDF)


def study_reports(session, study: Study):
    """Every report of a study, for its record package."""
    return report.study_reports(session, study, charts_of=charts_of,
                                software_version=_software_version())


@bp.route("/fits/<int:fit_id>/report.pdf")
@allow(SIGNED_IN)
def fit_pdf(fit_id: int):
    return fit_pdf_response(fit_id)


@bp.route("/setpoints/<int:proposal_id>/report.pdf")
@allow(SIGNED_IN)
def setpoint_pdf(proposal_id: int):
    return setpoint_pdf_response(proposal_id)
