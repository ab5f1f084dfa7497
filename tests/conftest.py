"""Shared fixtures: an app on a fresh database per test, SQLite always, PostgreSQL when
PLUMBLINE_TEST_DATABASE_URL is set; a logged-in client helper."""

from __future__ import annotations

import os
import re
import shutil
import uuid
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from app import create_app
from app.store.db import database
from app.store.migrate import upgrade
from app.workflow import accounts

PG_URL = os.environ.get("PLUMBLINE_TEST_DATABASE_URL")
BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])
PASSWORD = "correct horse battery staple"  # noqa: S105  (test accounts only)
TEST_ARGON2 = {"ARGON2_MEMORY_KIB": 19456, "ARGON2_TIME_COST": 2}  # the ASVS 5 floor


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("tpl") / "template.db"
    upgrade(f"sqlite:///{path}")
    return path


@pytest.fixture(scope="session")
def pg_template():
    if not PG_URL:
        yield None
        return
    name = f"plumbline_tpl_{uuid.uuid4().hex[:8]}"
    admin = create_engine(PG_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        c.execute(text(f'CREATE DATABASE "{name}"'))
    url = make_url(PG_URL).set(database=name).render_as_string(hide_password=False)
    upgrade(url)
    create_engine(url).dispose()
    yield name
    with admin.connect() as c:
        c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    admin.dispose()


def _fresh_database(backend: str, tmp_path: Path, sqlite_template: Path, pg_template):
    if backend == "sqlite":
        path = tmp_path / "plumbline.db"
        shutil.copy(sqlite_template, path)
        return f"sqlite:///{path}", None
    name = f"plumbline_t_{uuid.uuid4().hex[:10]}"
    admin = create_engine(PG_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        c.execute(text(f'CREATE DATABASE "{name}" TEMPLATE "{pg_template}"'))
    url = make_url(PG_URL).set(database=name).render_as_string(hide_password=False)

    def drop():
        with admin.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    return url, drop


@pytest.fixture(params=BACKENDS)
def backend(request) -> str:
    return request.param


@pytest.fixture
def app(backend, tmp_path, sqlite_template, pg_template):
    url, drop = _fresh_database(backend, tmp_path, sqlite_template, pg_template)
    application = create_app({
        "TESTING": True, "DATABASE_URL": url, "SECRET_KEY": "test-only-" + uuid.uuid4().hex,
        "SOFTWARE_VERSION": "test", **TEST_ARGON2,
    })
    application.instance_path = str(tmp_path / "instance")
    Path(application.instance_path).mkdir(exist_ok=True)
    yield application
    database(application).dispose()
    if drop:
        drop()


@pytest.fixture
def db(app):
    return database(app)


@pytest.fixture
def users(db):
    """One account per role, plus a second approver; all with PASSWORD."""
    spec = {
        "erin": ("Erin Engineer", "engineer"),
        "abel": ("Abel Approver", "approver"),
        "ada": ("Ada Second-Approver", "approver"),
        "otto": ("Otto Auditor", "auditor"),
        "root": ("Rita Admin", "admin"),
    }
    with db.transaction() as s:
        for username, (name, roles) in spec.items():
            accounts.create_user(s, None, username=username, full_name=name, roles=roles,
                                 password=PASSWORD)
    return spec


CSRF_RE = re.compile(r'name="csrf_token" value="([^"]+)"')


class Actions:
    def __init__(self, client):
        self.client = client

    def csrf(self) -> str:
        with self.client.session_transaction() as sess:
            token = sess.get("csrf")
        if token is None:
            page = self.client.get("/login")
            token = CSRF_RE.search(page.get_data(as_text=True)).group(1)
        return token

    def login(self, username: str, password: str = PASSWORD):
        return self.client.post("/login", data={"username": username, "password": password,
                                                "csrf_token": self.csrf()})

    def logout(self):
        return self.client.post("/logout", data={"csrf_token": self.csrf()})

    def post(self, url: str, data: dict | None = None, **kwargs):
        data = dict(data or {})
        data.setdefault("csrf_token", self.csrf())
        return self.client.post(url, data=data, **kwargs)


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def actions(client):
    return Actions(client)


@pytest.fixture
def cli_env(tmp_path, monkeypatch):
    """A SQLite database and instance folder of its own for the `plumbline` command."""
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    monkeypatch.setenv("PLUMBLINE_DATABASE_URL", url)
    monkeypatch.setenv("PLUMBLINE_INSTANCE_PATH", str(tmp_path / "instance"))
    monkeypatch.setenv("PLUMBLINE_ARGON2_MEMORY_KIB", "19456")
    monkeypatch.setenv("PLUMBLINE_ARGON2_TIME_COST", "2")
    from click.testing import CliRunner

    from app.cli import main

    runner = CliRunner()
    result = runner.invoke(main, ["db", "upgrade"])
    assert result.exit_code == 0, result.output
    return runner, url
