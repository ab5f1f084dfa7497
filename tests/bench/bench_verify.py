"""Audit verify benchmark (not a test; run by `make bench`): `plumbline audit verify` at 100,000
events.

A fresh SQLite database (migrated with the project's own upgrade) gets the demo scenario and a
fit of each demo study through the services, then ``BENCH_EVENTS`` (100,000) events in all,
the rest appended by ``audit.record`` in transactions of 5,000, so every event is hashed,
chained and sealed as in use. Then, each best of ``BENCH_REPEATS`` and measured by GNU time:

* ``plumbline audit verify`` on that database: wall time and peak resident memory;
* start-up: the same command on a migrated database without events (the fixed cost: imports,
  the application, the connection, the key ring); ``audit verify --help`` beside it.

The after-start-up figure is the first wall time less the second.
Targets (issue "Fast at any size"): ≤ 1 s for 100,000 events after start-up, ≤ 200 MB peak.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
EVENTS = int(os.environ.get("BENCH_EVENTS", "100000"))
REPEATS = int(os.environ.get("BENCH_REPEATS", "3"))
PER_TRANSACTION = 5000
# The `plumbline` entry point, run by this interpreter on this checkout's `app` package.
CLI = "import sys; from app.cli import main; sys.exit(main())"


def prepare(events: int) -> None:
    """Fill the database named by the environment (run in a child process)."""
    import json

    from sqlalchemy import func, select

    from app import create_app
    from app.analysis import Thresholds
    from app.demo import load_demo
    from app.store import audit
    from app.store.db import database
    from app.store.migrate import upgrade
    from app.store.models import AuditEvent, DataVersion, User
    from app.workflow import fits, reviews

    app = create_app()
    upgrade(app.config["DATABASE_URL"])
    if not events:
        return
    db = database(app)
    load_demo(app)
    with db.transaction() as s:
        engineer = s.scalar(select(User).where(User.roles.like("%engineer%")).limit(1))
        for version in s.scalars(select(DataVersion).order_by(DataVersion.id)):
            roles = json.loads(version.roles_json)
            response = next(c for c, r in roles.items() if r["role"] == "response")
            spec = fits.build_spec(version, response=response, model="linear",
                                   thresholds=Thresholds())
            fit = fits.create_fit(s, engineer, version, spec)
            reviews.submit(s, engineer, fit)
    with db.session(write=False) as s:
        done = s.scalar(select(func.count()).select_from(AuditEvent))
    while done < events:
        with db.transaction() as s:
            for i in range(done, min(events, done + PER_TRANSACTION)):
                digest = hashlib.sha256(str(i).encode()).hexdigest()
                audit.record(s, actor=None, action="bench.note", object_type="bench",
                             object_id=i, study_id=1 + i % 3,
                             old=None if i % 2 else {"note": f"bench event {i - 1}"},
                             new={"i": i, "note": f"bench event {i}", "sha256": digest},
                             reason="benchmark padding")
        done = min(events, done + PER_TRANSACTION)
    db.dispose()


def timed(command: list[str], env: dict) -> tuple[float, float, str]:
    """(wall seconds, peak resident MB, standard output) of a command, by GNU time; best of
    REPEATS."""
    best, stdout = (float("inf"), float("inf")), ""
    for _ in range(REPEATS):
        out = subprocess.run(["/usr/bin/time", "-f", "TIMED %e %M", *command], env=env,
                             capture_output=True, text=True, check=False, cwd=ROOT)
        line = next((x for x in out.stderr.splitlines() if x.startswith("TIMED ")), None)
        if out.returncode != 0 or line is None:
            raise SystemExit(f"{' '.join(command[-2:])} failed: {out.stdout[-400:]}"
                             f"{out.stderr[-800:]}")
        wall, kb = line.split()[1:]
        best, stdout = (min(best[0], float(wall)), min(best[1], int(kb) / 1024)), out.stdout
    return best[0], best[1], stdout


def _env(folder: Path) -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(ROOT), "PLUMBLINE_INSTANCE_PATH": str(folder),
            "PLUMBLINE_DATABASE_URL": f"sqlite:///{folder}/verify.db",
            "PLUMBLINE_INTEGRITY_KEY": "bench-verify-integrity-key",
            "PLUMBLINE_ARGON2_MEMORY_KIB": "19456", "PLUMBLINE_ARGON2_TIME_COST": "2"}


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        full, empty = Path(tmp) / "full", Path(tmp) / "empty"
        t0 = time.perf_counter()
        for folder, n in ((full, EVENTS), (empty, 0)):
            folder.mkdir()
            subprocess.run([sys.executable, __file__, "--prepare", str(n)], env=_env(folder),
                           check=True, cwd=ROOT)
        made = time.perf_counter() - t0
        verify = [sys.executable, "-c", CLI, "audit", "verify"]
        wall, peak, out = timed(verify, _env(full))
        base, base_peak, _ = timed(verify, _env(empty))
        helped, help_peak, _ = timed([*verify, "--help"], _env(empty))
    chain = next(x for x in out.splitlines() if x.startswith("chain "))
    print(f"plumbline audit verify, {EVENTS:,} events, SQLite (best of {REPEATS}; "
          f"database made in {made:.0f} s):")
    print(f"  {chain[:72]}…")
    print(f"  wall               {wall:6.2f} s")
    print(f"  start-up           {base:6.2f} s  ({base_peak:.0f} MB peak; verify on a database "
          f"without events; --help {helped:.2f} s, {help_peak:.0f} MB)")
    print(f"  after start-up     {wall - base:6.2f} s  (target <= 1.0 s)")
    print(f"  peak memory        {peak:6.0f} MB  (target <= 200 MB)")
    ok = wall - base <= 1.0 and peak <= 200
    return 0 if ok else 1


if __name__ == "__main__":
    if sys.argv[1:2] == ["--prepare"]:
        sys.path.insert(0, str(ROOT))
        prepare(int(sys.argv[2]))
        sys.exit(0)
    sys.exit(main())
