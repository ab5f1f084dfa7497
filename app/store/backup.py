"""SQLite online backup and restore, each followed by the integrity check and audit verify.

PostgreSQL sites use pg_dump / pg_restore; these functions refuse other URLs with that advice.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import create_engine
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session

from app.store import audit
from app.store.keys import Keyring


class BackupError(Exception):
    pass


@dataclass(frozen=True)
class BackupReport:
    path: str
    integrity: str
    chain: audit.ChainReport

    @property
    def ok(self) -> bool:
        return self.integrity == "ok" and self.chain.ok


def sqlite_path(url: str) -> Path:
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or not parsed.database:
        raise BackupError("backup and restore handle SQLite files; for PostgreSQL use pg_dump "
                          "and pg_restore")
    return Path(parsed.database)


def check_file(path: Path, ring: Keyring | None = None) -> BackupReport:
    """PRAGMA integrity_check and the audit chain of one SQLite file (with ``ring``, its seals
    too)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        integrity = "; ".join(r[0] for r in conn.execute("PRAGMA integrity_check"))
    finally:
        conn.close()
    engine = create_engine(f"sqlite:///{path}")
    try:
        with Session(engine) as s:
            chain = audit.verify(s, ring)
    finally:
        engine.dispose()
    return BackupReport(str(path), integrity, chain)


def _copy(source: Path, target: Path) -> None:
    src = sqlite3.connect(str(source))
    dst = sqlite3.connect(str(target))
    try:
        # The online backup API copies a consistent snapshot while others keep writing.
        src.backup(dst)
    finally:
        dst.close()
        src.close()


def backup(url: str, target: Path, ring: Keyring | None = None) -> BackupReport:
    source = sqlite_path(url)
    if not source.exists():
        raise BackupError(f"no database at {source}")
    target = Path(target)
    if target.exists():
        raise BackupError(f"{target} exists; choose a new file name")
    _copy(source, target)
    report = check_file(target, ring)
    if not report.ok:
        raise BackupError(f"backup written but it does not check out: integrity "
                          f"{report.integrity}; {report.chain.describe()}")
    return report


def restore(url: str, source: Path, ring: Keyring | None = None) -> BackupReport:
    """Replace the database with a backup (stop the server first). The backup is checked
    before anything is overwritten, and the result after."""
    source = Path(source)
    if not source.exists():
        raise BackupError(f"no backup at {source}")
    before = check_file(source, ring)
    if not before.ok:
        raise BackupError(f"refusing to restore: the backup does not check out: integrity "
                          f"{before.integrity}; {before.chain.describe()}")
    target = sqlite_path(url)
    target.parent.mkdir(parents=True, exist_ok=True)
    _copy(source, target)
    return check_file(target, ring)
