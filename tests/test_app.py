"""Application factory: configuration order and the secret key."""

from __future__ import annotations

import os
import stat

from app import create_app


def _env_app(tmp_path, monkeypatch, **env):
    monkeypatch.setenv("PLUMBLINE_INSTANCE_PATH", str(tmp_path / "instance"))
    monkeypatch.setenv("PLUMBLINE_DATABASE_URL", f"sqlite:///{tmp_path / 'x.db'}")
    monkeypatch.delenv("PLUMBLINE_SECRET_KEY", raising=False)
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    return create_app()


def test_secret_key_is_generated_once_into_the_instance_folder(tmp_path, monkeypatch):
    first = _env_app(tmp_path, monkeypatch)
    key_file = tmp_path / "instance" / "secret_key"
    assert key_file.exists()
    assert stat.S_IMODE(os.stat(key_file).st_mode) == 0o600
    assert len(first.config["SECRET_KEY"]) >= 64
    second = _env_app(tmp_path, monkeypatch)
    assert second.config["SECRET_KEY"] == first.config["SECRET_KEY"]
    other = _env_app(tmp_path / "elsewhere", monkeypatch)
    assert other.config["SECRET_KEY"] != first.config["SECRET_KEY"]


def test_environment_overrides_and_debug_is_off(tmp_path, monkeypatch):
    app = _env_app(tmp_path, monkeypatch, PLUMBLINE_SECRET_KEY="from-the-environment-" + "x" * 40,
                   PLUMBLINE_SESSION_IDLE_MINUTES="15")
    assert app.config["SECRET_KEY"].startswith("from-the-environment-")
    assert app.config["SESSION_IDLE_MINUTES"] == 15
    assert app.debug is False
    assert not (tmp_path / "instance" / "secret_key").exists()


def test_instance_config_file_is_read(tmp_path, monkeypatch):
    (tmp_path / "instance").mkdir()
    (tmp_path / "instance" / "config.py").write_text("MAX_UPLOAD_BYTES = 1234\n")
    app = _env_app(tmp_path, monkeypatch)
    assert app.config["MAX_UPLOAD_BYTES"] == 1234
