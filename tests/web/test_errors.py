"""Error pages are generic: no traceback, no exception text, on HTML pages and the API alike."""

from __future__ import annotations

import logging
import uuid

from app import create_app
from app.web.access import PUBLIC, allow
from tests.conftest import TEST_ARGON2


def _app_with_failing_routes(tmp_path, sqlite_template):
    import shutil

    db_path = tmp_path / "errors.db"
    shutil.copy(sqlite_template, db_path)
    app = create_app({"TESTING": False, "DATABASE_URL": f"sqlite:///{db_path}",
                      "SECRET_KEY": uuid.uuid4().hex, **TEST_ARGON2})
    app.instance_path = str(tmp_path)

    @allow(PUBLIC)
    def explode():
        raise RuntimeError("secret internals: password=hunter2 at /srv/app.py line 3")

    app.add_url_rule("/boom", "boom", explode)
    app.add_url_rule("/api/v1/boom", "api_boom", explode)
    return app


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__()
        self.records: list[logging.LogRecord] = []

    def emit(self, record):
        self.records.append(record)


def test_unhandled_error_shows_no_traceback(tmp_path, sqlite_template):
    app = _app_with_failing_routes(tmp_path, sqlite_template)
    collect = _Collect()
    app.logger.addHandler(collect)
    client = app.test_client()
    for url in ("/boom", "/api/v1/boom"):
        response = client.get(url)
        body = response.get_data(as_text=True)
        assert response.status_code == 500
        assert "Traceback" not in body and "secret internals" not in body
        assert "hunter2" not in body and "app.py" not in body
        assert "Something went wrong on the server" in body
    assert client.get("/api/v1/boom").is_json
    # The details go to the server log instead.
    assert any(r.exc_info and "secret internals" in str(r.exc_info[1]) for r in collect.records)


def test_not_found_is_plain(client):
    response = client.get("/no/such/page")
    assert response.status_code == 404
    assert "Not found" in response.get_data(as_text=True)
    api = client.get("/api/v1/no-such-thing")
    assert api.status_code == 404 and api.is_json and api.json["status"] == 404
