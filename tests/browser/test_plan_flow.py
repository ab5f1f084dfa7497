"""In Chromium: plan a central composite design in a study, look at its evaluation, download the
run sheet, run it (the oven 2 °C short on the first run), upload the results against the plan,
see the deviation, fit, submit and sign; the approver sees the plan's seed and the deviation."""

from __future__ import annotations

from app.store.db import database
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.browser.test_signoff_flow import _sign_out
from tests.web.test_plans import FACTORS, _results
from tests.workflow import helpers as h


def test_plan_run_upload_fit_and_sign(page, live_server, tmp_path):
    db = database(live_server.app)
    study_id = h.make_study(db, title="Cure oven, planned")
    login(page, "erin")
    page.goto(f"{page.base}/studies/{study_id}")
    page.click("text=Plan an experiment")
    page.select_option("select[name=design]", "central_composite")
    page.select_option("select[name=axial]", "rotatable")
    for i, f in enumerate(FACTORS):
        for key in ("name", "low", "high", "units"):
            page.fill(f"input[name={key}_{i}]", str(f[key]))
    page.fill("input[name=centre_points]", "6")
    page.fill("input[name=seed]", "20261203")
    page.fill("input[name=responses]", "Hardness")
    page.fill("input[name=effect]", "4")
    page.fill("input[name=sigma]", "1.5")
    page.click("button:has-text('Build the plan')")
    page.wait_for_selector("h1:has-text('Plan 1: Central composite')")
    assert "seed 20261203" in page.inner_text(".facts")
    assert page.locator("#evaluation-terms tbody tr").count() == 9  # the quadratic's terms
    assert "%" in page.inner_text("#evaluation-terms")  # power per term
    assert page.locator("#sheet tbody tr").count() == 20
    screenshot(page, "plan-page")

    with page.expect_download() as got:
        page.click("text=Run sheet (CSV)")
    sheet = got.value.path().read_text(encoding="utf-8")
    filled = tmp_path / "cure-runs.csv"
    filled.write_bytes(_results(sheet, oven_short_by=2.0))

    page.click("text=Upload results against this plan")
    assert page.input_value("select[name=plan_id]") == "1"
    page.set_input_files("input[type=file]", str(filled))
    page.click("button:has-text('Read file')")
    page.wait_for_selector("h1:has-text('Preview')")
    assert "the roles below come from the plan" in page.inner_text("main")
    page.click("button:has-text('Store as a new data version')")
    page.wait_for_selector("h1:has-text('Data version 1')")
    deviations = page.inner_text("#plan-deviations")
    assert "Cure temperature" in deviations and "-2" in deviations
    screenshot(page, "data-against-plan")

    page.click("text=Fit a model")
    page.select_option("select[name=response]", "Hardness")
    page.select_option("select[name=model]", "quadratic")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 1')")
    fit_url = page.url
    page.click("button:has-text('Submit for review')")
    page.wait_for_selector(".signoff .state.submitted")
    _sign_out(page)

    login(page, "abel")
    page.goto(fit_url.replace("/fits/1", "/fits/1/review"))
    review = page.inner_text("#plan-deviations")
    assert "randomised from seed 20261203" in review and "Cure temperature" in review
    page.check("input[value='approved for setpoint use']")
    page.fill("input[name=password]", PASSWORD)
    page.click("section[aria-label='Sign this fit'] button:has-text('Sign')")
    page.wait_for_selector(".signoff .state.approved")
    screenshot(page, "review-with-plan")
    page.watch.assert_clean()
