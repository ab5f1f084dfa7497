"""Smoke test in real Chromium: sign in, create a study, upload a CSV, see the preview, store it."""

from __future__ import annotations

from app.demo_data import rsm_study
from tests.browser.conftest import login, screenshot


def test_engineer_creates_study_and_uploads(page, tmp_path):
    demo = rsm_study()
    csv_path = tmp_path / demo.filename
    csv_path.write_bytes(demo.csv_bytes)

    login(page, "erin")
    page.click("text=New study")
    page.fill("input[name=title]", "Browser smoke study")
    page.fill("textarea[name=purpose]", "Check that the pages work end to end.")
    page.click("button:has-text('Create study')")
    page.wait_for_selector("h1:has-text('Browser smoke study')")

    page.click("text=Upload data")
    page.set_input_files("input[type=file]", str(csv_path))
    page.click("button:has-text('Read file')")
    page.wait_for_selector("h1:has-text('Preview')")
    text = page.inner_text("main")
    assert "20 data rows" in text
    # Suggested roles are shown for confirmation: the factor's declared low level is prefilled.
    assert page.input_value("select[aria-label='Role of Cure temperature']") == "factor"
    assert page.input_value("input[aria-label='Low level of Cure temperature']") == "150"
    screenshot(page, "upload-preview")

    page.click("button:has-text('Store as a new data version')")
    page.wait_for_selector("h1:has-text('Data version 1')")
    assert "Runs (20)" in page.inner_text("main")
    screenshot(page, "data-version")
    page.watch.assert_clean()


def test_bad_file_shows_problems_and_stores_nothing(page, tmp_path, live_server):
    bad = tmp_path / "bad.csv"
    bad.write_bytes(b"")
    login(page, "erin")
    page.click("text=New study")
    page.fill("input[name=title]", "Bad upload study")
    page.click("button:has-text('Create study')")
    page.click("text=Upload data")
    page.set_input_files("input[type=file]", str(bad))
    page.click("button:has-text('Read file')")
    page.wait_for_selector(".problems")
    assert "not stored" in page.inner_text(".problems")
    screenshot(page, "upload-empty-file")
    from sqlalchemy import func, select

    from app.store.db import database
    from app.store.models import DataVersion

    with database(live_server.app).session() as s:
        assert s.scalar(select(func.count()).select_from(DataVersion)) == 0
