"""PDF reports: the fit report and the setpoint sheet carry what the record needs on paper.

Text is read back from the PDF with pypdf. ``REPORT_SHOTS=dir`` keeps the PDFs made here, to
look at (``pdftoppm -r 60 -png file.pdf dir/p``).
"""

from __future__ import annotations

import io
import json
import os
import re
from pathlib import Path

import pytest
from pypdf import PdfReader
from sqlalchemy import text as sql

from app.analysis.optimize import CAUTION
from app.store import audit
from app.web.charts import all_charts
from app.workflow import fits, reviews, setpoints
from app.workflow.report import fit_report, setpoint_sheet, url_fetcher, utc_text
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h
from tests.workflow.test_setpoints import GOALS, propose, release

TITLE = "Cure oven <b>study</b> & friends"


def keep(name: str, data: bytes) -> None:
    folder = os.environ.get("REPORT_SHOTS")
    if folder:
        Path(folder).mkdir(parents=True, exist_ok=True)
        (Path(folder) / name).write_bytes(data)


def pages_text(data: bytes) -> list[str]:
    """Each page's text with runs of white space made one space."""
    return [re.sub(r"\s+", " ", page.extract_text()) for page in PdfReader(io.BytesIO(data)).pages]


def squeezed(text: str) -> str:
    """Text without white space: a hash broken over two lines reads as one again."""
    return re.sub(r"\s+", "", text)


def charts_of(fit):
    return all_charts(fits.results_of(fit), cols=fits.runs_of(fit))


def render_fit(db, fit_id: int) -> bytes:
    with db.session() as s:
        fit = fits.get_fit(s, fit_id)
        return fit_report(s, fit, charts=charts_of(fit), software_version="9.9.9",
                          printed_by="Otto Auditor")


@pytest.fixture
def signed_fit(db, users):
    study_id = h.make_study(db, title=TITLE)
    version_id = h.add_version(db, study_id)
    fit_id = h.make_fit(db, version_id, exclusions={3: "Thermocouple fell off the rack"})
    h.submit(db, fit_id)
    h.sign(db, fit_id, comment="Residuals look like noise; release for setpoints.")
    return study_id, fit_id


def test_fit_report_carries_the_record_on_every_page(db, signed_fit):
    study_id, fit_id = signed_fit
    data = render_fit(db, fit_id)
    keep("fit.pdf", data)
    assert data.startswith(b"%PDF-")
    pages = pages_text(data)
    assert 3 <= len(pages) <= 40
    with db.session() as s:
        fit = fits.get_fit(s, fit_id)
        snapshot = fit.snapshot_sha256
        (sig,) = fit.signatures
        signed_at = utc_text(sig.signed_at)
        seq, head = audit.chain_head(s)
        results = fits.results_of(fit)
        chart_titles = [c.title for c in charts_of(fit)]
    for number, text in enumerate(pages, start=1):
        assert TITLE in text, number
        assert f"Fit {fit_id} · Hardness" in text, number
        assert f"page {number} of {len(pages)}" in text, number
        assert snapshot[:12] in text, number
    whole = " ".join(pages)
    assert snapshot in squeezed(whole)
    assert head in squeezed(whole) and f"#{seq}" in whole
    # the signature as signed, and its validity when printed
    assert "Abel Approver" in whole and "abel" in whole
    assert reviews.APPROVE in whole and signed_at in whole
    assert "Residuals look like noise; release for setpoints." in whole
    assert "valid the signed snapshot is unchanged" in whole
    # every check with its verdict, every chart with its title, the exclusion and its reason
    for check in results["checks"]:
        assert check["question"] in whole
    for title in chart_titles:
        assert title in whole, title
    assert "Thermocouple fell off the rack" in whole
    assert "Natural units" not in whole and "natural units" in whole
    assert "9.9.9" in whole and "Otto Auditor" in whole


def test_fit_report_says_when_a_signature_no_longer_applies(db, signed_fit):
    study_id, fit_id = signed_fit
    h.add_version(db, study_id, reason="Two runs re-measured")
    whole = " ".join(pages_text(render_fit(db, fit_id)))
    assert "not applying data version 2 is newer than the signed version 1" in whole


def test_fit_report_shows_a_snapshot_altered_behind_the_services_back(db, signed_fit):
    _study, fit_id = signed_fit
    with db.transaction() as s:
        drop_signed_row_triggers(s)
        s.execute(sql("UPDATE fits SET thresholds_json = :t WHERE id = :i"),
                  {"t": json.dumps({"review": 0.2, "fail": 0.01}), "i": fit_id})
    whole = " ".join(pages_text(render_fit(db, fit_id)))
    assert "This snapshot no longer matches its recorded SHA-256." in whole
    assert "does NOT match its recorded hash" in whole
    assert "invalid" in whole and "valid the signed snapshot is unchanged" not in whole


def test_draft_fit_report_says_it_is_not_signed(db, users):
    version_id = h.add_version(db, h.make_study(db))
    fit_id = h.make_fit(db, version_id, model="linear")
    whole = " ".join(pages_text(render_fit(db, fit_id)))
    assert "Not signed." in whole and "draft" in whole


def test_setpoint_sheet_carries_the_caution_on_every_page(db, signed_fit):
    _study, fit_id = signed_fit
    proposal_id = propose(db, [fit_id], GOALS)
    with db.session() as s:
        draft = setpoint_sheet(s, setpoints.get_proposal(s, proposal_id), software_version="9")
    assert draft.startswith(b"%PDF-")
    draft_pages = pages_text(draft)
    assert "NOT for production use." in draft_pages[0] and "Not signed." in " ".join(draft_pages)
    release(db, proposal_id, comment="Run three confirmation batches.")
    with db.session() as s:
        proposal = setpoints.get_proposal(s, proposal_id)
        data = setpoint_sheet(s, proposal, software_version="9")
        (sig,) = setpoints.release_signatures(s, proposal)
        signed_at, snapshot = utc_text(sig.signed_at), proposal.snapshot_sha256
    keep("setpoints.pdf", data)
    pages = pages_text(data)
    for number, text in enumerate(pages, start=1):
        assert CAUTION in text, number
        assert f"page {number} of {len(pages)}" in text, number
        assert TITLE in text and f"Setpoint sheet {proposal_id} · from fit {fit_id}" in text
        assert snapshot[:12] in text
    whole = " ".join(pages)
    assert "Abel Approver" in whole and signed_at in whole and setpoints.RELEASE in whole
    assert "Run three confirmation batches." in whole and snapshot in squeezed(whole)
    # the goal in the words of the page: the limits the search filled in, not dashes
    with db.session() as s:
        filled = setpoints.result_of(setpoints.get_proposal(s, proposal_id))["goals"]
    (response, goal), = filled.items()
    assert f"acceptable from {goal['lower']:g}" in " ".join(whole.split()), response


def test_reports_load_nothing_from_outside():
    fetcher = url_fetcher()
    with pytest.raises(ValueError, match="disallowed protocol"):
        fetcher.fetch("file:///etc/passwd")
    assert fetcher.fetch("data:text/plain;base64,aGk=").read() == b"hi"
