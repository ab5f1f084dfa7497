"""Sign-off in real Chromium: an engineer submits, an approver signs with a password, and an
auditor sees the events and exports them."""

from __future__ import annotations

import csv
import io

from app.store.db import database
from tests.browser.conftest import PASSWORD, login, screenshot
from tests.workflow import helpers as h


def _sign_out(page):
    page.click("button:has-text('Sign out')")
    page.wait_for_url("**/login**")


def test_submit_sign_and_audit(page, live_server):
    db = database(live_server.app)
    study_id = h.make_study(db, title="Cure oven sign-off")
    fit_id = h.make_fit(db, h.add_version(db, study_id), model="quadratic",
                        exclusions={3: "panel scratched before measurement"})

    login(page, "erin")
    page.goto(f"{page.base}/fits/{fit_id}")
    page.click("button:has-text('Submit for review')")
    page.wait_for_selector(".signoff .state.submitted")
    _sign_out(page)

    login(page, "abel")
    page.goto(f"{page.base}/fits/{fit_id}/review")
    main = page.inner_text("main")
    assert "panel scratched before measurement" in main
    assert "Checks that could not run" in main
    page.check("input[value='approved for setpoint use']")
    page.fill("textarea[name=comment]", "Residual checks adequate for setpoint work.")
    page.fill("input[name=password]", "not my password")
    page.click("section[aria-label='Sign this fit'] button:has-text('Sign')")
    page.wait_for_selector(".problem")
    assert "password is wrong" in page.inner_text(".problem")
    # The refusal sits beside the form, far down a long page: the page opens on it.
    assert page.evaluate("""() => { const r = document.querySelector('#sign-error')
        .getBoundingClientRect(); return r.top >= 0 && r.bottom <= window.innerHeight; }""")
    assert page.evaluate("document.activeElement.id") == "sign-error"
    # The refusal is answered with HTTP 403, which Chromium logs; that one entry is expected.
    assert len(page.watch.console_errors) == 1 and "403" in page.watch.console_errors[0]
    page.watch.console_errors.clear()
    page.check("input[value='approved for setpoint use']")
    page.fill("input[name=password]", PASSWORD)
    page.click("section[aria-label='Sign this fit'] button:has-text('Sign')")
    page.wait_for_selector(".signoff .state.approved")
    signatures = page.inner_text(".signoff table.signatures")
    assert "Abel Approver" in signatures and "approved for setpoint use" in signatures
    assert "UTC" in signatures and "valid" in signatures
    screenshot(page, "review-signed")
    page.watch.assert_clean()
    _sign_out(page)

    login(page, "otto")
    page.goto(f"{page.base}/history/studies/{study_id}")
    timeline = page.inner_text("table.events")
    for action in ("fit.submit", "signature.refused", "fit.approve"):
        assert action in timeline
    screenshot(page, "history-timeline")
    with page.expect_download() as info:
        page.click("text=Export CSV")
    rows = list(csv.reader(io.StringIO(info.value.path().read_text(encoding="utf-8"))))
    assert rows[1][0] == "chain head"
    actions = [r[3] for r in rows[4:]]
    assert actions.index("fit.submit") < actions.index("signature.refused") \
        < actions.index("fit.approve")
    page.click("text=Integrity check")
    page.wait_for_selector("h1:has-text('Integrity check')")
    assert "Everything checked holds." in page.inner_text("main")
    page.watch.assert_clean()
