"""The proposal form in real Chromium: one block per response, and only the fields the chosen
goal uses are shown (hidden, and disabled so a stale value is not sent)."""

from __future__ import annotations

from app.store.db import database
from tests.browser.conftest import login, screenshot
from tests.workflow import helpers as h


def _shown(page, name: str) -> bool:
    return page.is_visible(f"input[name={name}]")


def test_each_goal_shows_only_its_fields(page, live_server):
    db = database(live_server.app)
    study_id, hardness, gloss = h.study_with_approved_fits(db, "Cure window, line 2")
    login(page, "erin")
    page.goto(f"{page.base}/studies/{study_id}/setpoints/new")
    assert page.locator("fieldset.response-goal").count() == 2
    assert page.locator("table.goals").count() == 0

    uses = {"maximize": {"lower", "upper", "shape", "weight"},
            "minimize": {"lower", "upper", "shape", "weight"},
            "target": {"lower", "upper", "target", "shape", "shape_above", "weight"},
            "within": {"lower", "upper"}, "none": set()}
    for goal, fields in uses.items():
        page.select_option(f"select[name=goal_{gloss}]", goal)
        for name in ("lower", "upper", "target", "shape", "shape_above", "weight"):
            assert _shown(page, f"{name}_{gloss}") == (name in fields), (goal, name)
            assert page.is_disabled(f"input[name={name}_{gloss}]") == (name not in fields)
        # the specification limits for the map stay whatever the goal
        assert _shown(page, f"spec_lower_{gloss}") and _shown(page, f"spec_upper_{gloss}")
    page.select_option(f"select[name=goal_{gloss}]", "within")
    block = page.locator(f"fieldset[data-fit='{gloss}']")
    assert "no less than" in block.inner_text() and "fully satisfying" not in block.inner_text()
    page.select_option(f"select[name=goal_{hardness}]", "maximize")
    hard = page.locator(f"fieldset[data-fit='{hardness}']").inner_text()
    assert "acceptable from" in hard and "fully satisfying from" in hard
    assert "weight in D" in hard
    page.check(f"input[name=fit][value='{hardness}']")
    page.check(f"input[name=fit][value='{gloss}']")
    page.fill(f"input[name=lower_{gloss}]", "0")
    screenshot(page, "setpoint-form")
    page.click("button:has-text('Search for setpoints')")
    page.wait_for_selector("h1:has-text('Setpoint proposal')")
