"""Setpoints in real Chromium: from approved fits to a released setpoint sheet to a
confirmation verdict, with the caution on every page."""

from __future__ import annotations

from sqlalchemy import select

from app.analysis.optimize import CAUTION
from app.store.db import database
from app.store.models import SetpointProposal
from app.workflow import setpoints
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.workflow import helpers as h


def _sign_out(page):
    page.click("button:has-text('Sign out')")
    page.wait_for_url("**/login**")


def _approved(db, version_id, response):
    fit_id = h.make_fit(db, version_id, model="quadratic", response=response)
    h.submit(db, fit_id)
    h.sign(db, fit_id)
    return fit_id


def test_approved_fits_to_released_sheet_to_confirmation_verdict(page, live_server, tmp_path):
    db = database(live_server.app)
    study_id = h.make_study(db, title="Cure window, line 2")
    version_id = h.add_version(db, study_id)
    hardness = _approved(db, version_id, "Hardness")
    gloss = _approved(db, version_id, "Gloss")

    login(page, "erin")
    page.goto(f"{page.base}/studies/{study_id}/setpoints/new")
    assert CAUTION in page.inner_text(".caution")
    page.check(f"input[name=fit][value='{hardness}']")
    page.check(f"input[name=fit][value='{gloss}']")
    page.select_option(f"select[name=goal_{hardness}]", "maximize")
    page.fill(f"input[name=spec_lower_{hardness}]", "120")
    page.select_option(f"select[name=goal_{gloss}]", "target")
    page.fill(f"input[name=target_{gloss}]", "86")
    page.fill(f"input[name=lower_{gloss}]", "82")
    page.fill(f"input[name=upper_{gloss}]", "90")
    page.fill(f"input[name=spec_lower_{gloss}]", "83")
    page.click("button:has-text('Search for setpoints')")
    page.wait_for_selector("h1:has-text('Setpoint proposal')")
    main = page.inner_text("main")
    assert CAUTION in main
    for words in ("Settings", "95 % CI", "95 % PI", "Overall desirability D",
                  "Sensitivity at the setpoint", "Eigenvalues", "Not released"):
        assert words in main
    screenshot(page, "setpoint-sheet-draft")

    page.click("text=Design-space map")
    page.wait_for_selector("#design-space-chart.rendered svg")
    assert CAUTION in page.inner_text(".caution")
    assert "inside the design space" in page.inner_text("main")
    screenshot(page, "setpoint-design-space")
    page.watch.assert_clean()
    sheet_url = page.url.rsplit("/design-space", 1)[0]
    _sign_out(page)

    login(page, "abel")
    page.goto(sheet_url)
    page.fill("input[name=password]", "not my password")
    page.click("button:has-text('Sign and release')")
    page.wait_for_selector(".problem")
    assert "password is wrong" in page.inner_text(".problem")
    # The refusal is answered with HTTP 403, which Chromium logs; that one entry is expected.
    assert len(page.watch.console_errors) == 1 and "403" in page.watch.console_errors[0]
    page.watch.console_errors.clear()
    page.fill("textarea[name=comment]", "Cure window agreed for trial on line 2.")
    page.fill("input[name=password]", PASSWORD)
    page.click("button:has-text('Sign and release')")
    page.wait_for_selector("h1 .state:has-text('released')")
    release = page.inner_text("section.release")
    assert "Abel Approver" in release and setpoints.RELEASE in release and "valid" in release
    screenshot(page, "setpoint-released")
    _sign_out(page)

    with database(live_server.app).session() as s:
        proposal = s.scalar(select(SetpointProposal))
        optimum = setpoints.result_of(proposal)["optimum"]
    predicted = optimum["predicted"]
    rows = ["Panel ID,Hardness,Gloss",
            f"CV40-C01,{predicted['Hardness']:.1f},{predicted['Gloss']:.1f}",
            f"CV40-C02,{predicted['Hardness'] - 0.5:.1f},{predicted['Gloss'] + 0.2:.1f}"]
    upload = tmp_path / "confirmation.csv"
    upload.write_text("\n".join(rows) + "\n")

    login(page, "erin")
    page.goto(sheet_url)
    page.set_input_files("input[type=file]", str(upload))
    page.click("button:has-text('Check against the prediction intervals')")
    page.wait_for_selector(".confirmation .verdict")
    verdicts = page.inner_text(".confirmation")
    assert "overall pass" in verdicts
    assert verdicts.count("pass") >= 3  # overall, Hardness, Gloss
    assert CAUTION in page.inner_text(".caution")
    screenshot(page, "setpoint-confirmed")
    page.watch.assert_clean()
