"""In Chromium: upload the demo CSV, fit a quadratic with a run left out, see every chart,
highlight a run across charts, fit again and compare the two fits."""

from __future__ import annotations

from pathlib import Path

from app.web.charts import HIGHLIGHT
from tests.browser.conftest import SCREENSHOTS, login, screenshot

DEMO_CSV = Path(__file__).resolve().parents[2] / "app" / "demo" / "rsm_demo.csv"


def _upload_demo(page) -> None:
    page.click("text=New study")
    page.fill("input[name=title]", "Cure window, browser fit")
    page.click("button:has-text('Create study')")
    page.click("text=Upload data")
    page.set_input_files("input[type=file]", str(DEMO_CSV))
    page.click("button:has-text('Read file')")
    page.wait_for_selector("h1:has-text('Preview')")
    page.click("button:has-text('Store as a new data version')")
    page.wait_for_selector("h1:has-text('Data version 1')")


def fit_demo_quadratic(page) -> None:
    """Upload the demo, fit a quadratic to Hardness and land on the fit page."""
    _upload_demo(page)
    page.click("text=Fit a model")
    page.select_option("select[name=response]", "Hardness")
    page.select_option("select[name=model]", "quadratic")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 1')")


def _shot(locator, name: str) -> None:
    """A screenshot of one part of the page (the full page is too tall to read)."""
    SCREENSHOTS.mkdir(exist_ok=True)
    locator.screenshot(path=str(SCREENSHOTS / f"{name}.png"))


def _highlighted_marks(page, chart: str) -> int:
    return page.locator(f'figure[data-chart="{chart}"] svg path[fill="{HIGHLIGHT}"]').count()


def test_engineer_fits_checks_and_compares(page):
    login(page, "erin")
    _upload_demo(page)
    page.click("text=Fit a model")
    page.wait_for_selector("h1:has-text('Fit a model')")
    page.select_option("select[name=response]", "Hardness")
    page.select_option("select[name=model]", "quadratic")

    # Leaving a run out without a reason is refused by the browser and by the server.
    page.check("input[aria-label='Leave out row 3']")
    assert page.get_attribute("input[aria-label='Reason for leaving out row 3']",
                              "required") is not None
    page.fill("input[aria-label='Reason for leaving out row 3']",
              "Panel scratched while loading the oven")
    screenshot(page, "fit-builder")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 1')")

    # The verdict panel comes first, then the runs left out with their reason.
    assert page.locator("main section").first.get_attribute("id") == "verdicts"
    assert "Panel scratched while loading the oven" in page.inner_text("#excluded")
    page.wait_for_selector("#chart-grid.all-rendered", timeout=30000)
    figures = page.locator("figure[data-chart]")
    names = [figures.nth(i).get_attribute("data-chart") for i in range(figures.count())]
    assert {"normal_probability", "histogram", "residuals_vs_fitted", "run_order",
            "cooks_distance", "leverage", "boxcox_profile", "contour"} <= set(names)
    for name in names:
        assert page.locator(f'figure[data-chart="{name}"] .chart-canvas svg').count() == 1, name
    screenshot(page, "fit-page")
    _shot(page.locator("#verdicts"), "fit-page-verdicts")
    _shot(page.locator("#excluded"), "fit-page-excluded")

    # Clicking a run in one chart highlights the same run in the others.
    assert _highlighted_marks(page, "run_order") == 0
    point = page.locator('figure[data-chart="residuals_vs_fitted"] .mark-symbol.role-mark path')
    point.first.click()
    page.wait_for_function("window.plumblineCharts.highlighted > 0")
    row = page.evaluate("window.plumblineCharts.highlighted")
    page.wait_for_function(
        f"document.querySelectorAll('figure[data-chart=\"run_order\"] svg "
        f"path[fill=\"{HIGHLIGHT}\"]').length === 1")
    assert _highlighted_marks(page, "leverage") == 1
    assert _highlighted_marks(page, "cooks_distance") == 1
    assert "highlighted" in page.get_attribute(f"table.runs tr[data-row='{row}']", "class")
    page.locator('figure[data-chart="run_order"]').scroll_into_view_if_needed()
    screenshot(page, "fit-page-highlight")
    # A run left out of the fit is highlighted the same way from its hollow marker.
    hollow = page.locator('figure[data-chart="residuals_vs_fitted"] .left_out_marks path')
    assert hollow.count() == 1
    hollow.first.click()
    page.wait_for_function(f"window.plumblineCharts.highlighted !== {row}")
    left_row = page.evaluate("window.plumblineCharts.highlighted")
    assert "excluded" in page.get_attribute(f"table.runs tr[data-row='{left_row}']", "class")
    assert "highlighted" in page.get_attribute(f"table.runs tr[data-row='{left_row}']",
                                               "class")
    page.wait_for_function(
        f"document.querySelectorAll('figure[data-chart=\"leverage\"] .left_out_marks "
        f"path[stroke=\"{HIGHLIGHT}\"]').length === 1")
    _shot(page.locator('figure[data-chart="leverage"]'), "fit-chart-left-out-highlighted")
    for name in ("residuals_vs_fitted", "run_order", "contour", "leverage"):
        _shot(page.locator(f'figure[data-chart="{name}"]'), f"fit-chart-{name}")

    # The verdict links lead to the charts; the text alternative is the chart's table.
    page.click("tr[data-check='normality'] a:has-text('see chart')")
    assert page.url.endswith("#chart-normal_probability")
    page.click("figure[data-chart='normal_probability'] summary")
    assert page.locator("figure[data-chart='normal_probability'] details table tbody tr"
                        ":not(.left-out)").count() == 19
    # the run left out is listed too, marked as such
    left_out = page.locator("figure[data-chart='normal_probability'] tr.left-out")
    assert left_out.count() == 1 and "left out" in left_out.inner_text()

    # Change and fit again: a new fit, then both side by side.
    page.click("text=Change and fit again")
    page.wait_for_selector("h1:has-text('Fit a model')")
    assert page.input_value("input[aria-label='Reason for leaving out row 3']") == (
        "Panel scratched while loading the oven")
    page.select_option("select[name=model]", "linear")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 2')")
    page.wait_for_selector("#chart-grid.all-rendered", timeout=30000)
    page.select_option("select[name=b]", "1")
    page.click("button:has-text('Compare side by side')")
    page.wait_for_selector("h1:has-text('Fit 2 beside fit 1')")
    terms = page.inner_text("#cmp-terms")
    assert "Cure temperature^2" in terms and "not in model" in terms
    assert page.locator("#cmp-checks tr").count() > 10
    screenshot(page, "fit-compare")
    page.watch.assert_clean()


def test_builder_term_picker_keeps_parents(page):
    login(page, "erin")
    _upload_demo(page)
    page.click("text=Fit a model")
    page.check("input[name=mode][value=terms]")
    # Switching to the picker starts from the named model's terms (quadratic: all nine).
    assert page.locator("input[name=terms]:checked").count() == 9
    # Parents cannot be cleared while hierarchy holds them: turn it off to clear everything.
    page.uncheck("#f-hierarchy")
    checked = page.locator("input[name=terms]:checked")
    while checked.count():
        checked.first.uncheck()
    page.check("#f-hierarchy")
    page.check("input[name=terms][value='Cure time:Catalyst']")
    needed = page.locator("label.term[data-term='Cure time'] .needed")
    assert needed.inner_text() == "needed by Cure time:Catalyst"
    assert page.is_checked("input[name=terms][value='Catalyst']")
    # A needed parent stays while hierarchy is on, and is released when it is turned off.
    page.click("input[name=terms][value='Catalyst']")
    assert page.is_checked("input[name=terms][value='Catalyst']")
    screenshot(page, "fit-builder-terms")
    page.uncheck("#f-hierarchy")
    assert not page.is_checked("input[name=terms][value='Catalyst']")
    page.check("#f-hierarchy")
    page.click("button:has-text('Fit the model')")
    page.wait_for_selector("h1:has-text('Fit 1')")
    assert "3 terms" in page.inner_text(".summary-line")
    page.watch.assert_clean()
