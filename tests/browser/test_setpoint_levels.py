"""In Chromium: setpoints from an approved fit with a categorical factor. The form offers the
factor's levels ("any level" searches each), the sheet names the proposed level and lists every
level compared, the release form asks a tolerance for the continuous factor only, and the PDF
sheet downloads."""

from __future__ import annotations

from app.analysis.optimize import CAUTION
from app.store.db import database
from app.workflow import setpoint_signoff as signoff
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.browser.test_setpoint_flow import _sign_out, form
from tests.workflow import helpers as h


def test_levels_searched_proposed_and_released(page, live_server, tmp_path):
    db = database(live_server.app)
    study_id, fit_id = h.approved_categorical_fit(db)

    login(page, "erin")
    page.goto(f"{page.base}/studies/{study_id}/setpoints/new")
    machine = page.locator("select[aria-label='Fixed level of Machine']")
    assert machine.locator("option").all_inner_texts() == ["any level", "M2", "M1", "M3"]
    assert page.locator("input[aria-label='Lower bound of Machine']").count() == 0
    page.check(f"input[name=fit][value='{fit_id}']")
    page.select_option(f"select[name=goal_{fit_id}]", "maximize")
    screenshot(page, "setpoint-levels-form")
    page.click("button:has-text('Search for setpoints')")
    page.wait_for_selector("h1:has-text('Setpoint proposal')")
    assert CAUTION in page.inner_text(".caution")
    settings = page.inner_text("table.settings")
    assert "M1" in settings and "level" in settings
    compared = page.locator("section.levels-compared")
    assert "Machine = M1 gives the highest predicted Gloss" in compared.inner_text()
    rows = compared.locator("tbody tr")
    assert rows.count() == 3
    assert compared.locator("tr.chosen th").inner_text() == "M1"
    assert "proposed" in compared.locator("tr.chosen").inner_text()
    assert page.locator("table.gradient thead th").all_inner_texts() == ["Response", "Speed"]
    screenshot(page, "setpoint-levels-sheet")
    page.watch.assert_clean()
    sheet_url = page.url
    _sign_out(page)

    login(page, "abel")
    page.goto(sheet_url)
    release = form(page, signoff.RELEASE)
    labels = release.locator("fieldset.tolerance label").all_inner_texts()
    assert len(labels) == 1 and labels[0].startswith("Speed ±")
    release.locator("input[name=password]").fill(PASSWORD)
    release.locator("button").click()
    page.wait_for_selector("h1 .state:has-text('released for confirmation')")
    assert "Speed ±" in page.inner_text("section.signoff")
    with page.expect_download() as caught:
        page.click("a.pdf-report")
    pdf = tmp_path / "sheet.pdf"
    caught.value.save_as(pdf)
    assert pdf.read_bytes()[:5] == b"%PDF-"
    page.watch.assert_clean()
