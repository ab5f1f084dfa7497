"""In Chromium: the "Download PDF report" link on the review page and the "Download PDF sheet"
link on the setpoint sheet each give a PDF download that carries the record."""

from __future__ import annotations

from app.analysis.optimize import CAUTION
from app.store.db import database
from app.workflow import reviews
from tests.browser.conftest import login
from tests.workflow import helpers as h
from tests.workflow.test_report import pages_text
from tests.workflow.test_setpoints import GOALS, propose, release


def _download(page, link_text: str, tmp_path) -> bytes:
    with page.expect_download() as info:
        page.click(f"a:has-text('{link_text}')")
    download = info.value
    path = tmp_path / download.suggested_filename
    download.save_as(str(path))
    return path.read_bytes()


def test_pdf_links_download_the_reports(page, live_server, tmp_path):
    db = database(live_server.app)
    _study, _version, fit_id = h.approved_fit(db)
    proposal_id = propose(db, [fit_id], GOALS)
    release(db, proposal_id)

    login(page, "otto")
    page.goto(f"{page.base}/fits/{fit_id}/review")
    report = _download(page, "Download PDF report", tmp_path)
    assert report.startswith(b"%PDF-")
    pages = pages_text(report)
    whole = " ".join(pages)
    assert f"page 1 of {len(pages)}" in pages[0]
    assert "Abel Approver" in whole and reviews.APPROVE in whole

    page.goto(f"{page.base}/setpoints/{proposal_id}")
    sheet = _download(page, "Download PDF sheet", tmp_path)
    assert sheet.startswith(b"%PDF-")
    assert all(CAUTION in text for text in pages_text(sheet))
    page.watch.assert_clean()
