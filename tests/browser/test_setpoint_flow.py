"""Setpoints in real Chromium: approved fits → proposal → released for confirmation →
confirmation runs → confirmed for production; and a failed confirmation → withdrawn. The caution
is on every page."""

from __future__ import annotations

from sqlalchemy import select

from app.analysis.optimize import CAUTION
from app.store.db import database
from app.store.models import SetpointProposal
from app.workflow import setpoint_signoff as signoff
from app.workflow import setpoints
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.workflow import helpers as h


def _sign_out(page):
    page.click("button:has-text('Sign out')")
    page.wait_for_url("**/login**")


def test_approved_fits_to_released_sheet_to_confirmation_verdict(page, live_server, tmp_path):
    db = database(live_server.app)
    study_id, hardness, gloss = h.study_with_approved_fits(db, "Cure window, line 2")

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
                  "Sensitivity at the setpoint", "Eigenvalues", "Not signed yet"):
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
    release = form(page, signoff.RELEASE)
    release.locator("input[name=password]").fill("not my password")
    release.locator("button").click()
    page.wait_for_selector(".problem")
    assert "password is wrong" in page.inner_text(".problem")
    # The refusal is answered with HTTP 403, which Chromium logs; that one entry is expected.
    assert len(page.watch.console_errors) == 1 and "403" in page.watch.console_errors[0]
    page.watch.console_errors.clear()
    release = form(page, signoff.RELEASE)
    tolerances = release.locator("fieldset.tolerance input")
    assert tolerances.count() == 3 and all(tolerances.nth(j).input_value() for j in range(3))
    release.locator("textarea[name=comment]").fill("Cure window agreed for trial on line 2.")
    release.locator("input[name=password]").fill(PASSWORD)
    screenshot(page, "setpoint-release-form")
    release.locator("button").click()
    page.wait_for_selector("h1 .state:has-text('released for confirmation')")
    signed = page.inner_text("section.signoff")
    assert "Abel Approver" in signed and signoff.RELEASE in signed and "valid" in signed
    assert "not for production use" in signed
    assert "Tolerance set at release" in signed
    screenshot(page, "setpoint-released-for-confirmation")
    _sign_out(page)

    upload = _runs(live_server, tmp_path, offset=0.0)
    login(page, "erin")
    page.goto(sheet_url)
    page.set_input_files("input[type=file]", str(upload))
    page.click("button:has-text('Judge the confirmation runs')")
    page.wait_for_selector(".confirmation .verdict")
    verdicts = page.inner_text(".confirmation")
    assert "overall pass" in verdicts and "interval for the mean" in verdicts
    assert verdicts.count("pass") >= 3  # overall, Hardness, Gloss
    screenshot(page, "setpoint-confirmation-passed")
    _sign_out(page)

    login(page, "ada")
    page.goto(sheet_url)
    confirm = form(page, signoff.CONFIRM)
    confirm.locator("textarea[name=comment]").fill("Two runs on line 2 agreed with the model.")
    confirm.locator("input[name=password]").fill(PASSWORD)
    confirm.locator("button").click()
    page.wait_for_selector("h1 .state:has-text('confirmed for production')")
    assert CAUTION in page.inner_text(".caution")
    screenshot(page, "setpoint-confirmed-for-production")
    page.watch.assert_clean()


def form(page, meaning):
    return page.locator(f"form.signoff-form[data-meaning='{meaning}']")


def _runs(live_server, tmp_path, offset: float):
    """Two runs at the released settings (factor columns included), their responses at the
    prediction plus ``offset`` prediction-interval widths."""
    with database(live_server.app).session() as s:
        proposal = s.scalar(select(SetpointProposal).order_by(SetpointProposal.id.desc()))
        optimum = setpoints.result_of(proposal)["optimum"]
    settings, predicted, pi = optimum["settings"], optimum["predicted"], optimum["pi"]
    names = list(settings)
    rows = [",".join(["Panel ID", *names, "Hardness", "Gloss"])]
    for n, nudge in enumerate((-0.05, 0.05), start=1):
        values = [repr(settings[k]) for k in names]
        cells = [predicted[r] + offset * (pi[r][1] - pi[r][0]) + nudge for r in ("Hardness",
                                                                                 "Gloss")]
        rows.append(",".join([f"CV40-C0{n}", *values, *(f"{c:.2f}" for c in cells)]))
    upload = tmp_path / f"confirmation-{offset}.csv"
    upload.write_text("\n".join(rows) + "\n")
    return upload


def test_failed_confirmation_is_never_released_and_is_withdrawn(page, live_server, tmp_path):
    from tests.workflow.test_setpoints import propose

    db = database(live_server.app)
    study_id, hardness, gloss = h.study_with_approved_fits(db, "Cure window, line 3")
    pid = propose(db, [hardness, gloss], goals={"Hardness": {"goal": "maximize"},
                                                 "Gloss": {"goal": "within", "lower": 83}})
    sheet_url = f"{page.base}/setpoints/{pid}"

    login(page, "abel")
    page.goto(sheet_url)
    assert page.inner_text("h1 .state") == "proposed"
    release = form(page, signoff.RELEASE)
    release.locator("input[name=password]").fill(PASSWORD)
    release.locator("button").click()
    page.wait_for_selector("h1 .state:has-text('released for confirmation')")
    _sign_out(page)

    login(page, "erin")
    page.goto(sheet_url)
    page.set_input_files("input[type=file]", str(_runs(live_server, tmp_path, offset=3.0)))
    page.click("button:has-text('Judge the confirmation runs')")
    page.wait_for_selector(".confirmation .verdict")
    assert "overall fail" in page.inner_text(".confirmation")
    state = page.inner_text("h1 .state")
    assert state == "confirmation failed" and "released" not in state
    assert "not for production use" in page.inner_text("section.signoff")
    assert page.locator("input[type=file]").count() == 0  # no more runs on a failed set
    screenshot(page, "setpoint-confirmation-failed")
    page.goto(f"{page.base}/studies/{study_id}")
    listed = page.inner_text("section.setpoints-link")
    assert "confirmation failed" in listed and "released" not in listed
    _sign_out(page)

    login(page, "abel")
    page.goto(sheet_url)
    assert form(page, signoff.CONFIRM).count() == 0
    withdraw = form(page, signoff.WITHDRAW)
    withdraw.locator("textarea[name=comment]").fill("Hardness low on both runs; refit first.")
    withdraw.locator("input[name=password]").fill(PASSWORD)
    withdraw.locator("button").click()
    page.wait_for_selector("h1 .state:has-text('withdrawn')")
    assert "Hardness low on both runs" in page.inner_text("section.signoff")
    screenshot(page, "setpoint-withdrawn")
    exported = page.request.get(f"{sheet_url}/export.csv").text()
    assert "withdrawn" in exported and "NOT for production use" in exported
    page.watch.assert_clean()
