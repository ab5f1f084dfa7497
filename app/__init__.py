"""Plumbline: designed-experiment models, residual checks and electronic sign-off."""

from __future__ import annotations

import os
import secrets
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # flask is imported lazily so that `import app.analysis` stays flask-free
    from flask import Flask

# Resources live beside the modules: app/templates, app/static and app/migrations are symlinks
# to the top-level folders in a checkout and real folders in an installed wheel.
PACKAGE = Path(__file__).parent
TEMPLATES = PACKAGE / "templates"
STATIC = PACKAGE / "static"
MIGRATIONS = PACKAGE / "migrations"


def default_instance_path() -> Path:
    """``PLUMBLINE_INSTANCE_PATH``, else ``./instance`` under the working directory.

    Never inside the installed package: site-packages is no place for a database or a key.
    """
    configured = os.environ.get("PLUMBLINE_INSTANCE_PATH")
    return Path(configured) if configured else Path.cwd() / "instance"


def _load_secret_key(app: Flask) -> None:
    """Use PLUMBLINE_SECRET_KEY, else a key generated once into the instance folder.

    There is no fixed default: a forgotten setting must never fall back to a known key.
    """
    if app.config.get("SECRET_KEY"):
        return
    key_file = Path(app.instance_path) / "secret_key"
    if not key_file.exists():
        key_file.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(key_file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as fh:
            fh.write(secrets.token_hex(32))
    app.config["SECRET_KEY"] = key_file.read_text().strip()


def software_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("plumbline")
    except PackageNotFoundError:
        return "0+unknown"


def create_app(test_config: dict[str, Any] | None = None, *, web: bool = True) -> Flask:
    """Build the Flask application: defaults, instance config, PLUMBLINE_* environment.

    Parameters
    ----------
    test_config
        Configuration taking the place of the instance config and the environment.
    web
        Register the pages and the API. Commands that only need the configuration and the
        database pass False, and so do without the analysis and chart libraries the pages
        import.
    """
    from flask import Flask

    app = Flask(
        __name__,
        instance_relative_config=True,
        template_folder=str(TEMPLATES),
        static_folder=str(STATIC),
        instance_path=str(default_instance_path().resolve()),
    )
    from app.config import DEFAULTS

    app.config.from_mapping(DEFAULTS)
    if test_config is None:
        app.config.from_pyfile("config.py", silent=True)
        app.config.from_prefixed_env("PLUMBLINE")
        for name in ("INTEGRITY_KEY", "INTEGRITY_RETIRED_KEYS"):
            if os.environ.get(f"PLUMBLINE_{name}"):
                # Taken as written: the JSON parsing above would turn an all-digit key into a
                # number.
                app.config[name] = os.environ[f"PLUMBLINE_{name}"]
    else:
        app.config.from_mapping(test_config)
    Path(app.instance_path).mkdir(parents=True, exist_ok=True)
    if not app.config.get("DATABASE_URL"):
        app.config["DATABASE_URL"] = "sqlite:///" + str(Path(app.instance_path) / "plumbline.db")
    _load_secret_key(app)
    app.config["MAX_CONTENT_LENGTH"] = int(app.config["MAX_UPLOAD_BYTES"]) + 1_000_000

    from app.workflow import passwords

    passwords.configure(int(app.config["ARGON2_MEMORY_KIB"]), int(app.config["ARGON2_TIME_COST"]),
                        int(app.config["ARGON2_PARALLELISM"]))
    if not app.config.get("SOFTWARE_VERSION"):
        app.config["SOFTWARE_VERSION"] = software_version()

    if app.config.get("BEHIND_PROXY"):
        # Whatever server runs the app (plumbline serve, gunicorn, a WSGI host), trust exactly
        # one proxy's X-Forwarded-* headers, so the audit trail and the login throttle see the
        # client's address, not the proxy's.
        from werkzeug.middleware.proxy_fix import ProxyFix

        app.wsgi_app = ProxyFix(app.wsgi_app, x_for=1, x_proto=1, x_host=1)

    from app.store import db

    db.init_app(app)

    if web:
        from app.web import register

        register(app)
    return app
