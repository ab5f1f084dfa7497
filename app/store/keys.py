"""The integrity key ring: the key that seals the record, kept outside the database.

Every audit event, fit snapshot, setpoint snapshot, signature manifest and confirmation result
keeps its plain SHA-256 (anyone can recompute it, also offline from a record package) and a
*seal*: HMAC-SHA-256 of that digest under the integrity key, with the key's id beside it. Whoever
can write the database file can recompute a SHA-256 but, without the key, not a seal.

The current key is ``INTEGRITY_KEY`` (``PLUMBLINE_INTEGRITY_KEY``), else a key generated once
into ``integrity_key`` in the instance folder (mode 0600). Keys taken out of service stay
readable so that older seals can still be checked: one per line in
``integrity_keys.retired`` in the instance folder (mode 0600), or comma-separated in
``INTEGRITY_RETIRED_KEYS`` (``PLUMBLINE_INTEGRITY_RETIRED_KEYS``). A key's id is the first 8 hex
digits of its SHA-256; ``plumbline audit rotate-key`` is the rotation procedure (README,
"Integrity key").
"""

from __future__ import annotations

import hashlib
import hmac
import os
import secrets
import tempfile
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property, lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from flask import Flask
    from sqlalchemy.orm import Session

KEY_FILE = "integrity_key"
RETIRED_FILE = "integrity_keys.retired"
# session.info key under which a Database's sessions find their KeySource.
SESSION_KEYS = "plumbline_integrity_keys"
# What a seal can cover; the kind is part of the sealed message, so a seal of one kind never
# passes as another.
KINDS = ("event", "fit", "setpoint", "signature", "confirmation", "plan")


def key_id(key: bytes) -> str:
    return hashlib.sha256(key).hexdigest()[:8]


def mac(key: bytes, kind: str, digest: str) -> str:
    """HMAC-SHA-256 of ``digest`` (a hex SHA-256) for a record of ``kind``."""
    if kind not in KINDS:
        raise ValueError(f"unknown seal kind {kind!r}")
    keyed = _keyed(key, kind).copy()
    keyed.update(digest.encode())
    return keyed.hexdigest()


def macs(key: bytes, kind: str, digests: Iterable[str]) -> list[str]:
    """:func:`mac` of each of ``digests`` under one key, for a verify that checks every event's
    seal: the standard library's HMAC keyed once and copied per message."""
    if kind not in KINDS:
        raise ValueError(f"unknown seal kind {kind!r}")
    keyed = _keyed(key, kind)
    out = []
    for digest in digests:
        one = keyed.copy()
        one.update(digest.encode())
        out.append(one.hexdigest())
    return out


@lru_cache(maxsize=32)
def _keyed(key: bytes, kind: str) -> hmac.HMAC:
    """The HMAC of ``key`` having taken the message's fixed start for ``kind`` (copied per
    message: a verify seals-checks every event with one or two keys)."""
    return hmac.new(key, f"plumbline/{kind}\x00".encode(), hashlib.sha256)


@dataclass(frozen=True)
class Keyring:
    """The current key and the retired ones, by id."""

    current: bytes
    retired: Mapping[str, bytes]

    @cached_property
    def current_id(self) -> str:
        return key_id(self.current)

    def key(self, kid: str | None) -> bytes | None:
        if kid is None:
            return None
        if kid == self.current_id:
            return self.current
        return self.retired.get(kid)

    def seal(self, kind: str, digest: str) -> tuple[str, str]:
        """(key id, seal) of ``digest`` under the current key."""
        return self.current_id, mac(self.current, kind, digest)

    def holds(self, kind: str, digest: str, kid: str | None, seal: str | None) -> bool | None:
        """True when ``seal`` is the seal of ``digest``; None when the key ``kid`` is not held
        here (the seal cannot be checked); False otherwise (also for a missing seal)."""
        if not kid or not seal:
            return False
        key = self.key(kid)
        if key is None:
            return None
        return same_seal(seal, mac(key, kind, digest))


def same_seal(stored: Any, made: str) -> bool:
    """Constant-time comparison of a stored seal with one just made. Compared as bytes: a
    stored value that is not ASCII text (a row edited behind the application's back) is then
    a seal that does not hold, not an error."""
    return hmac.compare_digest(str(stored).encode("utf-8", "surrogatepass"), made.encode())


def _write_new(path: Path, text: str) -> None:
    """Create ``path`` holding ``text`` (mode 0600), atomically: a second process either wins
    the link or reads the complete file, never an empty one."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass
    finally:
        os.unlink(tmp)


def new_key_text() -> str:
    return secrets.token_hex(32)


def load_or_create_key(configured: Any, key_file: Path) -> bytes:
    """The configured key, else the key in ``key_file``, generated there once (mode 0600)."""
    if configured:
        return str(configured).encode()
    if not key_file.exists():
        _write_new(key_file, new_key_text())
    key = key_file.read_text().strip()
    if not key:
        raise RuntimeError(f"the integrity key file {key_file} is empty")
    return key.encode()


def parse_retired(lines: Iterable[str]) -> dict[str, bytes]:
    """Retired keys, one per line (blank lines and ``#`` comments ignored), by id."""
    out = {}
    for line in lines:
        text = line.strip()
        if text and not text.startswith("#"):
            out[key_id(text.encode())] = text.encode()
    return out


class KeySource:
    """Finds one application's key ring when it is needed (not when the app is built, so an
    instance folder set after ``create_app`` is the one used)."""

    def __init__(self, app: Flask) -> None:
        self.app = app

    @property
    def folder(self) -> Path:
        return Path(self.app.instance_path)

    @property
    def configured(self) -> bool:
        return bool(self.app.config.get("INTEGRITY_KEY"))

    def ring(self) -> Keyring:
        current = load_or_create_key(self.app.config.get("INTEGRITY_KEY"),
                                     self.folder / KEY_FILE)
        retired = {}
        path = self.folder / RETIRED_FILE
        if path.exists():
            retired.update(parse_retired(path.read_text().splitlines()))
        configured = self.app.config.get("INTEGRITY_RETIRED_KEYS") or ""
        retired.update(parse_retired(str(configured).split(",")))
        retired.pop(key_id(current), None)
        return Keyring(current, retired)

    def rotate(self) -> tuple[str, str, Path]:
        """Prepare a rotation of a key kept in the instance folder: the current key is appended
        to the retired file, a new key written beside the key file. Returns (old id, new id,
        the new key's file); :func:`install` puts the new key in place once the rotation is on
        the record."""
        if self.configured:
            raise RuntimeError(
                "the integrity key is set by PLUMBLINE_INTEGRITY_KEY: rotate it there (add the "
                "old key to PLUMBLINE_INTEGRITY_RETIRED_KEYS, set the new one) and run "
                "`plumbline audit rotate-key --record` to put the rotation on the record")
        old = self.ring().current
        append_secret(self.folder / RETIRED_FILE, old.decode())
        pending = self.folder / (KEY_FILE + ".new")
        pending.unlink(missing_ok=True)
        _write_new(pending, new_key_text())
        new = pending.read_text().strip().encode()
        return key_id(old), key_id(new), pending

    def install(self, pending: Path) -> None:
        os.replace(pending, self.folder / KEY_FILE)


def append_secret(path: Path, line: str) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
    try:
        os.write(fd, (line + "\n").encode())
        os.fsync(fd)
    finally:
        os.close(fd)


def ring_of(session: Session) -> Keyring | None:
    """The key ring of the Database ``session`` came from (cached on the session), or None for
    a session made elsewhere (such a session can read and verify, not write the trail)."""
    ring = session.info.get("plumbline_keyring")
    if ring is None:
        source = session.info.get(SESSION_KEYS)
        if source is None:
            return None
        ring = session.info["plumbline_keyring"] = source.ring()
    return ring


def sealing_ring(session: Session) -> Keyring:
    ring = ring_of(session)
    if ring is None:
        raise RuntimeError("this database session has no integrity key: open it through "
                           "app.store.db.Database so that what it writes is sealed")
    return ring


# What a stored seal says, checked with a session's key ring.
SEALED, UNSEALED, BROKEN, KEY_NOT_HELD, UNCHECKED = (
    "sealed", "unsealed", "broken", "key not held", "unchecked")


def seal_state(session: Session | None, kind: str, digest: str, kid: str | None,
               seal: str | None) -> str:
    """SEALED, BROKEN (the seal does not match the digest), UNSEALED (no seal: a row from
    before sealing began, or one whose seal was removed), KEY_NOT_HELD, or UNCHECKED (no key
    ring: a session made outside a Database)."""
    ring = None if session is None else ring_of(session)
    if ring is None:
        return UNCHECKED
    if not kid and not seal:
        return UNSEALED
    held = ring.holds(kind, digest, kid, seal)
    if held is None:
        return KEY_NOT_HELD
    return SEALED if held else BROKEN


SEAL_PROBLEMS = {
    BROKEN: "its seal does not match its stored hash (rewritten without the integrity key)",
    UNSEALED: "it carries no seal (written or rewritten without the integrity key)",
    KEY_NOT_HELD: "it is sealed with a key that is not held here",
}
