"""PDF reports through the API: the same documents and rules as app.web.reports."""

from __future__ import annotations

from flask import Blueprint

from app.web.access import SIGNED_IN, allow
from app.web.openapi import Media, document
from app.web.reports import fit_pdf_response, setpoint_pdf_response

bp = Blueprint("api_reports", __name__, url_prefix="/api/v1")

PDF_BODY = Media({"application/pdf": {"type": "string", "format": "binary"}})


@bp.route("/fits/<int:fit_id>/report.pdf")
@allow(SIGNED_IN)
@document("GET", "/fits/{fit_id}/report.pdf", "The fit report as a PDF", tags=("Fits",),
          responses={200: ("The fit, its residual checks with their charts, exclusions, "
                           "signatures with their validity when printed, and the audit chain "
                           "head; as an attachment", PDF_BODY)})
def fit_pdf(fit_id: int):
    return fit_pdf_response(fit_id)


@bp.route("/setpoints/<int:proposal_id>/report.pdf")
@allow(SIGNED_IN)
@document("GET", "/setpoints/{proposal_id}/report.pdf", "The setpoint sheet as a PDF",
          tags=("Setpoints",),
          responses={200: ("Settings, predictions, confirmation runs, signatures with their "
                           "validity when printed, the audit chain head and the caution on "
                           "every page; as an attachment", PDF_BODY)})
def setpoint_pdf(proposal_id: int):
    return setpoint_pdf_response(proposal_id)
