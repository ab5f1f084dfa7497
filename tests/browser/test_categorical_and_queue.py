"""In Chromium: a supplier column fitted as a categorical factor (one ANOVA row for the factor,
one coefficient per level but the last, a spread check over its levels), then the approver
lands on the queue with the fit awaiting review and its age, and the engineer sees it come back
returned with the comment."""

from __future__ import annotations

import numpy as np

from app.store.db import database
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.browser.test_signoff_flow import _sign_out
from tests.workflow import helpers as h


def _supplier_csv(path) -> None:
    """Three suppliers × three temperatures, twice: a known model plus noise (simulated)."""
    rng = np.random.default_rng(3)
    lines = ["Run,Supplier,Temp,Hardness"]
    run = 0
    for _ in range(2):
        for supplier, shift in (("Birch", 2.0), ("Alder", -1.0), ("Cedar", -1.0)):
            for temp in (150, 160, 170):
                run += 1
                y = 60 + shift + 0.2 * (temp - 160) + rng.normal(scale=0.5)
                lines.append(f"{run},{supplier},{temp},{y:.3f}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_categorical_fit_then_the_review_queue(page, live_server, tmp_path):
    db = database(live_server.app)
    study_id = h.make_study(db, title="Lacquer suppliers")
    data = tmp_path / "suppliers.csv"
    _supplier_csv(data)
    login(page, "erin")
    page.goto(f"{page.base}/studies/{study_id}/upload")
    page.set_input_files("input[type=file]", str(data))
    page.click("button:has-text('Read file')")
    page.wait_for_selector("h1:has-text('Preview')")
    page.select_option("select[aria-label='Role of Supplier']", "factor_categorical")
    page.select_option("select[aria-label='Role of Temp']", "factor")
    page.fill("input[aria-label='Low level of Temp']", "150")
    page.fill("input[aria-label='High level of Temp']", "170")
    page.click("button:has-text('Store as a new data version')")
    page.wait_for_selector("h1:has-text('Data version 1')")
    page.click("text=Fit a model")
    page.select_option("select[name=model]", "linear")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 1')")
    main = page.inner_text("main")
    assert "Supplier[Birch]" in main and "Supplier[Alder]" in main
    assert "Supplier[Cedar]" not in main.split("Analysis of variance")[0].split("Coefficients")[-1]
    assert page.locator("tr[data-check='constant_variance_factor:Supplier']").count() == 1
    page.wait_for_selector("#chart-grid.all-rendered", timeout=30000)
    screenshot(page, "categorical-fit")
    page.click("button:has-text('Submit for review')")
    page.wait_for_selector(".signoff .state.submitted")
    _sign_out(page)

    login(page, "abel")  # lands on the studies page
    queue = page.inner_text("#queue")
    assert "Fit 1: Hardness" in queue and "awaiting your review" in queue
    assert "Lacquer suppliers" in queue
    screenshot(page, "review-queue")
    page.click("#queue a:has-text('Fit 1: Hardness')")
    page.check("input[value='returned for rework']")
    page.fill("textarea[name=comment]", "Add a second temperature block before approval.")
    page.fill("input[name=password]", PASSWORD)
    page.click("section[aria-label='Sign this fit'] button:has-text('Sign')")
    page.wait_for_selector(".signoff .state.returned")
    _sign_out(page)

    login(page, "erin")
    returned = page.inner_text("#returned")
    assert "Fit 1: Hardness" in returned and "Abel Approver" in returned
    assert "Add a second temperature block before approval." in returned
    screenshot(page, "returned-to-you")
    page.watch.assert_clean()
