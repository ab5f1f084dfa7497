"""The audit chain's head, anchored outside the database.

Whoever can write the database file can delete the last events and move ``chain_head`` back;
the chain then verifies. So after every committed transaction that appended audit events, the
new head (sequence number, event hash, UTC time) is appended with an HMAC-SHA-256 under the
integrity key as one JSON line to ``audit-anchor.log`` in the instance folder. ``plumbline audit
verify --anchor FILE`` then requires every anchored head to be in the chain.

The file is opened with ``O_APPEND`` and each line is one ``write``, so lines from two processes
never mix, though they may land out of order. Writing happens after the commit: a rolled-back
transaction leaves no line, and a file that cannot be written is logged, never turned into a
failed request (the change is already committed).

The key is the current integrity key (:mod:`app.store.keys`); each line names it by its id, and
lines made under a retired key are still checked with that key.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from sqlalchemy import event

from app.store.audit import GENESIS_HASH, PENDING_HEAD, canonical_json
from app.store.base import utcnow
from app.store.keys import Keyring, KeySource, key_id, same_seal

if TYPE_CHECKING:
    from flask import Flask
    from sqlalchemy.orm import Session, sessionmaker

log = logging.getLogger(__name__)

ANCHOR_FILE = "audit-anchor.log"
FORMAT = 1


def _mac(key: bytes, seq: int, head_hash: str, at: str, kid: str) -> str:
    message = canonical_json({"seq": seq, "hash": head_hash, "at": at, "key_id": kid})
    return hmac.new(key, message.encode(), hashlib.sha256).hexdigest()


def anchor_line(key: bytes, seq: int, head_hash: str, at: str | None = None) -> str:
    """One anchor line (JSON, no newline) for the head ``seq``/``head_hash``."""
    at = at or utcnow().strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    kid = key_id(key)
    return canonical_json({"v": FORMAT, "seq": seq, "hash": head_hash, "at": at, "key_id": kid,
                           "mac": _mac(key, seq, head_hash, at, kid)})


def append_line(path: Path, line: str) -> None:
    """Append one line atomically: ``O_APPEND`` and a single write, then fsync."""
    data = (line + "\n").encode()
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
    try:
        written = os.write(fd, data)
        if written != len(data):
            raise OSError(f"short write to {path}: {written} of {len(data)} bytes")
        os.fsync(fd)
    finally:
        os.close(fd)


class AuditAnchor:
    """Anchors the heads committed through one application's sessions.

    The instance folder and the key are looked up when a line is written, not when the app is
    built, so an instance path set after ``create_app`` (as the tests do) is the one used.
    """

    def __init__(self, app: Flask, keys: KeySource) -> None:
        self.app = app
        self.keys = keys

    @property
    def path(self) -> Path:
        return Path(self.app.instance_path) / ANCHOR_FILE

    def key(self) -> bytes:
        return self.keys.ring().current

    def line(self, seq: int, head_hash: str) -> str:
        return anchor_line(self.key(), seq, head_hash)

    def watch(self, maker: sessionmaker) -> None:
        """Listen on every session ``maker`` hands out."""
        event.listen(maker, "after_begin", self._forget)
        event.listen(maker, "after_soft_rollback", self._forget_rollback)
        event.listen(maker, "after_commit", self._after_commit)

    @staticmethod
    def _forget(session: Session, *_args: Any) -> None:
        session.info.pop(PENDING_HEAD, None)

    @staticmethod
    def _forget_rollback(session: Session, _previous: Any) -> None:
        session.info.pop(PENDING_HEAD, None)

    def _after_commit(self, session: Session) -> None:
        head = session.info.pop(PENDING_HEAD, None)
        if head is None:
            return
        try:
            append_line(self.path, self.line(*head))
        except Exception:  # the change is committed; a missing anchor line must not undo that
            log.exception("could not append audit head #%s to the anchor file %s", head[0],
                          self.path)


@dataclass
class AnchorReport:
    """What an anchor file says about the chain."""

    checked: int = 0
    highest: int | None = None
    missing: list[int] = field(default_factory=list)
    mismatched: list[int] = field(default_factory=list)
    bad_lines: list[str] = field(default_factory=list)
    other_keys: dict[str, int] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return not (self.missing or self.mismatched or self.bad_lines)

    def problems(self) -> list[str]:
        out = []
        if self.missing:
            top = max(self.missing)
            out.append(f"anchored head #{top} is missing from the chain (events removed from "
                       f"the end; {len(self.missing)} anchored head(s) missing)")
        for seq in sorted(self.mismatched):
            out.append(f"event #{seq} does not have the anchored hash (rewritten)")
        out.extend(self.bad_lines)
        return out

    def notes(self) -> list[str]:
        return [f"{n} anchor line(s) made with key {kid} cannot be checked: that key is not "
                "held here" for kid, n in sorted(self.other_keys.items())]

    def describe(self) -> str:
        if not self.ok:
            return "anchor check failed: " + "; ".join(self.problems())
        if not self.checked:
            return "anchors: no line checkable with the current key"
        return f"anchors hold: {self.checked} anchored heads, the highest #{self.highest}"


def check_anchors(lines: Iterable[str], ring: Keyring | bytes,
                  chain: Mapping[int, str]) -> AnchorReport:
    """Check every anchor line against ``chain`` (sequence number → event hash).

    Lines may be in any order. A line under a key the ring does not hold (current or retired)
    is counted as not checkable; a line
    that is malformed or whose MAC does not verify is a problem.
    """
    if isinstance(ring, bytes):
        ring = Keyring(ring, {})
    report = AnchorReport()
    for number, raw in enumerate(lines, start=1):
        if not raw.strip():
            continue
        try:
            rec = json.loads(raw)
            seq, head_hash, at, line_kid, mac = (rec["seq"], rec["hash"], rec["at"],
                                                 rec["key_id"], rec["mac"])
            if not (isinstance(seq, int) and all(isinstance(v, str)
                                                 for v in (head_hash, at, line_kid, mac))):
                raise TypeError
        except (ValueError, KeyError, TypeError):
            report.bad_lines.append(f"anchor line {number} is not an anchor record")
            continue
        key = ring.key(line_kid)
        if key is None:
            report.other_keys[line_kid] = report.other_keys.get(line_kid, 0) + 1
            continue
        if not same_seal(mac, _mac(key, seq, head_hash, at, line_kid)):
            report.bad_lines.append(f"anchor line {number} (head #{seq}) has an invalid MAC "
                                    "(altered)")
            continue
        report.checked += 1
        report.highest = seq if report.highest is None else max(report.highest, seq)
        stored = GENESIS_HASH if seq == 0 else chain.get(seq)  # the empty chain's head
        if stored is None:
            if seq not in report.missing:
                report.missing.append(seq)
        elif stored != head_hash and seq not in report.mismatched:
            report.mismatched.append(seq)
    return report
