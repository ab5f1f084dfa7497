"""Uploaded files waiting for their preview to be confirmed.

Nothing is stored in the database before the user confirms; until then the bytes sit in the
instance folder under a random name, readable only by the user who uploaded them, for a day.
"""

from __future__ import annotations

import json
import os
import re
import secrets
import time
from dataclasses import dataclass
from pathlib import Path

from flask import current_app

MAX_AGE_SECONDS = 24 * 3600
TOKEN_RE = re.compile(r"^[A-Za-z0-9_-]{20,64}$")


@dataclass(frozen=True)
class Staged:
    token: str
    filename: str
    user_id: int
    study_id: int
    data: bytes


def _folder() -> Path:
    folder = Path(current_app.instance_path) / "staging"
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def _sweep(folder: Path) -> None:
    cutoff = time.time() - MAX_AGE_SECONDS
    for path in folder.iterdir():
        try:
            if path.stat().st_mtime < cutoff:
                path.unlink()
        except FileNotFoundError:
            pass


def stage(data: bytes, filename: str, user_id: int, study_id: int) -> str:
    folder = _folder()
    _sweep(folder)
    token = secrets.token_urlsafe(24)
    (folder / f"{token}.bin").write_bytes(data)
    (folder / f"{token}.json").write_text(json.dumps(
        {"filename": filename, "user_id": user_id, "study_id": study_id}))
    return token


def load(token: str, user_id: int, study_id: int) -> Staged | None:
    if not TOKEN_RE.match(token or ""):
        return None
    folder = _folder()
    meta_path, data_path = folder / f"{token}.json", folder / f"{token}.bin"
    if not meta_path.exists() or not data_path.exists():
        return None
    meta = json.loads(meta_path.read_text())
    if meta["user_id"] != user_id or meta["study_id"] != study_id:
        return None
    return Staged(token, meta["filename"], user_id, study_id, data_path.read_bytes())


def discard(token: str) -> None:
    if not TOKEN_RE.match(token or ""):
        return
    for suffix in (".bin", ".json"):
        try:
            os.unlink(_folder() / f"{token}{suffix}")
        except FileNotFoundError:
            pass
