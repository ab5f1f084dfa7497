"""Plumbline: designed-experiment models, residual checks and electronic sign-off."""

from __future__ import annotations

import os
import secrets
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # flask is imported lazily so that `import app.analysis` stays flask-free
    from flask import Flask

ROOT = Path(__file__).resolve().parent.parent


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


def create_app(test_config: dict[str, Any] | None = None) -> Flask:
    """Build the Flask application: defaults, instance config, PLUMBLINE_* environment."""
    from flask import Flask

    app = Flask(
        __name__,
        instance_relative_config=True,
        template_folder=str(ROOT / "templates"),
        static_folder=str(ROOT / "static"),
        instance_path=os.environ.get("PLUMBLINE_INSTANCE_PATH") or str(ROOT / "instance"),
    )
    from app.config import DEFAULTS

    app.config.from_mapping(DEFAULTS)
    if test_config is None:
        app.config.from_pyfile("config.py", silent=True)
        app.config.from_prefixed_env("PLUMBLINE")
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

    from app.store import db

    db.init_app(app)

    from app.web import register

    register(app)
    return app
