"""Real Chromium through Playwright against a live server on 127.0.0.1.

Chromium comes from Debian's package (`shutil.which("chromium")`); Playwright never downloads a
browser. Outside CI the tests skip when Chromium is absent; with PLUMBLINE_REQUIRE_BROWSER=1 (set
by .ci/run) they fail instead.
"""

from __future__ import annotations

import os
import shutil
import threading
import uuid
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from werkzeug.serving import make_server

from app import create_app
from app.store.db import database
from app.workflow import accounts
from tests.conftest import PASSWORD, TEST_ARGON2

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
SCREENSHOTS = Path(__file__).resolve().parent / "screenshots"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--disable-dev-shm-usage"]


def pytest_collection_modifyitems(config, items):
    for item in items:
        if "tests/browser/" in str(item.fspath):
            item.add_marker(pytest.mark.browser)


@pytest.fixture(scope="session")
def chromium_path():
    if CHROMIUM is None:
        if os.environ.get("PLUMBLINE_REQUIRE_BROWSER") == "1" or os.environ.get("CI"):
            pytest.fail("Chromium is required here but `chromium` is not on PATH")
        pytest.skip("Chromium not installed (apt-get install chromium); browser tests skipped")
    return CHROMIUM


@pytest.fixture
def live_server(tmp_path, sqlite_template):
    """The app on a free loopback port with its own SQLite database and browser-test users."""
    db_path = tmp_path / "browser.db"
    shutil.copy(sqlite_template, db_path)
    app = create_app({"TESTING": False, "DATABASE_URL": f"sqlite:///{db_path}",
                      "SECRET_KEY": uuid.uuid4().hex, "SOFTWARE_VERSION": "test",
                      **TEST_ARGON2})
    app.instance_path = str(tmp_path / "instance")
    Path(app.instance_path).mkdir()
    with database(app).transaction() as s:
        for username, name, roles in (("erin", "Erin Engineer", "engineer"),
                                      ("abel", "Abel Approver", "approver"),
                                      ("ada", "Ada Second-Approver", "approver"),
                                      ("otto", "Otto Auditor", "auditor")):
            accounts.create_user(s, None, username=username, full_name=name, roles=roles,
                                 password=PASSWORD)
    server = make_server("127.0.0.1", 0, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    server.app = app
    server.url = f"http://127.0.0.1:{server.server_port}"
    yield server
    server.shutdown()
    thread.join(timeout=10)
    database(app).dispose()


@pytest.fixture(scope="session")
def browser(chromium_path):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        instance = pw.chromium.launch(executable_path=chromium_path, headless=True,
                                      args=CHROMIUM_ARGS)
        yield instance
        instance.close()


class PageWatch:
    """Console errors and any request that would leave 127.0.0.1."""

    def __init__(self, page):
        self.console_errors: list[str] = []
        self.outside_requests: list[str] = []
        page.on("console", self._console)
        page.on("pageerror", lambda exc: self.console_errors.append(f"pageerror: {exc}"))
        page.on("request", self._request)

    def _console(self, msg):
        if msg.type == "error":
            self.console_errors.append(msg.text)

    def _request(self, request):
        host = urlsplit(request.url).hostname
        if request.url.startswith(("data:", "blob:", "about:")):
            return
        if host not in ("127.0.0.1",):
            self.outside_requests.append(request.url)

    def assert_clean(self):
        assert self.outside_requests == [], f"requests left 127.0.0.1: {self.outside_requests}"
        assert self.console_errors == [], f"console errors: {self.console_errors}"


@pytest.fixture
def page(browser, live_server):
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    pg = context.new_page()
    pg.set_default_timeout(15000)
    pg.watch = PageWatch(pg)
    pg.base = live_server.url
    yield pg
    context.close()


def login(pg, username: str, password: str = PASSWORD) -> None:
    pg.goto(pg.base + "/login")
    pg.fill("input[name=username]", username)
    pg.fill("input[name=password]", password)
    pg.click("button[type=submit]")
    pg.wait_for_url("**/studies/")


def screenshot(pg, name: str) -> Path:
    SCREENSHOTS.mkdir(exist_ok=True)
    path = SCREENSHOTS / f"{name}.png"
    pg.screenshot(path=str(path), full_page=True)
    return path
