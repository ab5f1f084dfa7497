"""In Chromium: from a fit page to the profiler; drag a slider and type a value, and the
prediction, its intervals and every trace follow; a value beyond the runs says so."""

from __future__ import annotations

from tests.browser.conftest import login, screenshot
from tests.browser.test_fit_flow import fit_demo_quadratic


def _cells(page) -> dict[str, str]:
    return {name: page.inner_text(f'#profiler-point [data-cell="{name}"]')
            for name in ("predicted", "ci", "pi", "inside")}


def _line(page, n: int) -> str:
    """The nth trace's line (its SVG path), to see it move."""
    return page.locator("#profiler-chart .mark-line path").nth(n).get_attribute("d")


def test_profiler_follows_typed_and_dragged_settings(page):
    login(page, "erin")
    fit_demo_quadratic(page)
    page.click("text=Predict at chosen settings")
    page.wait_for_selector("h1:has-text('Profiler: Hardness')")
    page.wait_for_selector("#profiler-chart.rendered")
    assert page.locator("#profiler-chart .mark-line path").count() == 3  # one per factor
    assert "Confirmation runs are required" in page.inner_text(".setpoint-caution")
    start, time_line = _cells(page), _line(page, 1)
    assert start["inside"] == "inside"

    # Dragging the temperature slider moves the point and redraws the other traces.
    page.locator("input[data-slider='Cure temperature']").fill("170")
    page.wait_for_selector("#profiler-form[data-drawn='1']")
    moved = _cells(page)
    assert moved["predicted"] != start["predicted"]
    assert page.input_value("input[data-factor='Cure temperature']") == "170"
    assert _line(page, 1) != time_line
    screenshot(page, "profiler")

    # A typed time beyond every run: the prediction says it extrapolates.
    page.fill("input[data-factor='Cure time']", "60")
    page.wait_for_selector("#profiler-form[data-drawn='2']")
    assert _cells(page)["inside"].startswith("outside")
    assert "Cure+time=60" in page.url  # the address keeps the settings
    page.watch.assert_clean()
