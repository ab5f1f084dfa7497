"""Crash test: SIGKILL the real server at random points during upload, fit and sign operations.

The server is ``plumbline serve`` (waitress) on a free 127.0.0.1 port with its own SQLite file.
An engineer uploads the demo data, fits a quadratic model of Hardness and submits it; an approver
approves each submitted fit (which supersedes the one approved before it). A seeded killer sends
SIGKILL at random points after some operations start (a random 20–600 ms, or a random fraction of
that kind's usual duration; aimed within the usual duration for a kind no kill has caught yet),
so kills land inside requests: in the upload's parse and write, the analysis of a fit, the
argon2id check of the signer's password, and in the commits. After every kill the file is checked
while the server is down (the run goes on for at least 200 operations and 20 kills, 15 of them
inside an operation and each kind caught at least once):

- ``PRAGMA integrity_check`` answers "ok";
- the audit chain verifies (:func:`app.store.audit.verify`);
- each operation is all or nothing: every stored row has its audit event and every event its row
  (data versions, fits, signatures, submits, approvals, supersessions);
- every operation the server answered 2xx is still there (a commit that was acknowledged holds).

Then the server is restarted and the next operation is chosen from the state the API reports.
"""

from __future__ import annotations

import http.client
import json
import os
import random
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
import uuid
from collections import Counter
from contextlib import closing
from pathlib import Path
from typing import Any

import pytest

from app import PACKAGE, create_app
from app.demo_data import rsm_roles
from app.store.backup import check_file
from app.store.db import database
from app.workflow import accounts, reviews, studies
from tests.conftest import TEST_ARGON2

# The CLI installed beside the interpreter running the tests (a venv's bin/ or Scripts/).
PLUMBLINE = Path(sys.executable).parent / "plumbline"
DEMO_CSV = PACKAGE / "demo" / "rsm_demo.csv"
ROLES_JSON = json.dumps({name: role.to_dict() for name, role in rsm_roles().items()})
PASSWORDS = {"erin": "erin crash test pass phrase", "abel": "abel crash test pass phrase"}
KINDS = ("upload", "fit", "submit", "sign")

OPERATIONS = 200          # at least this many operations ...
MIN_KILLS = 20            # ... and at least this many kills (the run goes on until both hold)
MIN_INSIDE = 15           # ... of which this many inside an operation, each kind at least once
MAX_OPERATIONS = 400      # but never more operations than this
SEED = 7_2024
KILL_CHANCE = 0.18        # per operation without a kill pending
MAX_KILLS = 48            # bounds the restarts (each costs a server start-up)
KILL_DELAY_S = (0.020, 0.600)
# Operations take 20-100 ms, so a 20-600 ms delay mostly lands in a later operation or between
# two. Half of the kills instead fall within the operation just started, at a random fraction
# of the time that kind has taken so far (parse, analysis, argon2id, commit or the answer).
SCALED_SHARE = 0.5
SCALED_FRACTION = (0.05, 1.1)
AIMED_CHANCE = 0.5        # per operation of a kind not yet interrupted inside
AIMED_FRACTION = (0.1, 0.8)
UPLOAD_SHARE = 0.3        # when no fit waits for a step: upload a new version instead of a fit
HTTP_TIMEOUT_S = 60
START_TIMEOUT_S = 90
HANG_GUARD_S = 900        # not a speed check: only stops a run that hangs
# reviews.sign and reviews.withdraw each store one Signature row with one of these events.
SIGNATURE_ACTIONS = ("fit.approve", "fit.return", "fit.withdraw")
NOT_DRAFT = ("submitted", "approved", "returned", "superseded", "withdrawn")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """One ``plumbline serve`` process at a time; a seeded killer may SIGKILL it."""

    def __init__(self, env: dict[str, str], log: Path):
        self.env, self.log = env, log
        self.proc: subprocess.Popen | None = None
        self.port = 0
        self.timer: threading.Timer | None = None
        self.kill_sent = threading.Event()

    def start(self) -> None:
        self.port = _free_port()
        self.kill_sent.clear()
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen(
                [str(PLUMBLINE), "serve", "--host", "127.0.0.1", "--port", str(self.port)],
                env=self.env, stdout=subprocess.DEVNULL, stderr=log)
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"server exited with {self.proc.returncode}: "
                                     f"{self.log.read_text(errors='replace')[-2000:]}")
            try:
                if request(self.port, "GET", "/healthz", timeout=2)[0] == 200:
                    return
            except (OSError, http.client.HTTPException):
                time.sleep(0.05)
        raise AssertionError(f"server did not answer /healthz within {START_TIMEOUT_S} s")

    def arm(self, delay: float) -> None:
        """SIGKILL the server ``delay`` seconds from now (one pending kill at a time)."""
        proc = self.proc

        def fire() -> None:
            self.kill_sent.set()
            proc.send_signal(signal.SIGKILL)

        self.timer = threading.Timer(delay, fire)
        self.timer.start()

    @property
    def armed(self) -> bool:
        return self.timer is not None and not self.kill_sent.is_set()

    def wait_dead(self) -> int:
        self.timer.join()
        return self.proc.wait(timeout=30)

    def stop(self) -> None:
        if self.timer is not None:
            self.timer.cancel()
            self.timer.join()
            self.timer = None
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
        if self.proc is not None:
            self.proc.wait(timeout=30)


def request(port: int, method: str, path: str, *, token: str | None = None,
            body: bytes | None = None, content_type: str | None = None,
            timeout: float = HTTP_TIMEOUT_S) -> tuple[int, Any]:
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    if content_type:
        headers["Content-Type"] = content_type
    with closing(http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)) as conn:
        conn.request(method, path, body=body, headers=headers)
        response = conn.getresponse()
        data = response.read()
    try:
        return response.status, json.loads(data)
    except ValueError:
        return response.status, data.decode(errors="replace")[:300]


def multipart(fields: dict[str, str], filename: str, data: bytes) -> tuple[bytes, str]:
    boundary = "crash-" + uuid.uuid4().hex
    parts = [f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n'
             f"{value}\r\n".encode() for name, value in fields.items()]
    parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="file"; '
                 f'filename="{filename}"\r\nContent-Type: text/csv\r\n\r\n'.encode()
                 + data + b"\r\n")
    parts.append(f"--{boundary}--\r\n".encode())
    return b"".join(parts), f"multipart/form-data; boundary={boundary}"


def prepare(db_path: Path, instance: Path) -> tuple[dict[str, str], dict[str, str], int]:
    """Migrate with the CLI; users, tokens and the study through the services.

    Returns the server's environment, the API token of each user, and the study's id.
    """
    env = {**os.environ, "PLUMBLINE_DATABASE_URL": f"sqlite:///{db_path}",
           "PLUMBLINE_INSTANCE_PATH": str(instance), "PLUMBLINE_ARGON2_MEMORY_KIB": "19456",
           "PLUMBLINE_ARGON2_TIME_COST": "2"}
    subprocess.run([str(PLUMBLINE), "db", "upgrade"], env=env, check=True, capture_output=True,
                   timeout=120)
    app = create_app({"DATABASE_URL": f"sqlite:///{db_path}", "SECRET_KEY": uuid.uuid4().hex,
                      "SOFTWARE_VERSION": "test", **TEST_ARGON2})
    tokens, study_id = {}, None
    try:
        with database(app).transaction() as s:
            for username, full_name, roles in (("erin", "Erin Engineer", "engineer"),
                                               ("abel", "Abel Approver", "approver")):
                user = accounts.create_user(s, None, username=username, full_name=full_name,
                                            roles=roles, password=PASSWORDS[username])
                tokens[username] = accounts.create_token(s, None, user, "crash test")[1]
                if username == "erin":
                    study_id = studies.create_study(s, user, title="Cure window, crash test").id
    finally:
        database(app).dispose()
    return env, tokens, study_id


def check_database(db_path: Path, acknowledged: dict[str, set[int]]) -> dict[str, int]:
    """The checks run while the server is down; returns the row counts."""
    # Opened read-write first: after a SIGKILL the first connection recovers the WAL, which a
    # read-only one (check_file's) may not do.
    with closing(sqlite3.connect(db_path, timeout=10)) as con:
        def count(sql: str, *args) -> int:
            return con.execute(sql, args).fetchone()[0]

        def events(action: str) -> Counter:
            return Counter(int(r[0]) for r in con.execute(
                "SELECT object_id FROM audit_events WHERE action = ?", (action,)))

        n = {table: count(f"SELECT count(*) FROM {table}")  # noqa: S608 (fixed names)
             for table in ("studies", "data_versions", "fits", "signatures", "audit_events")}
        assert n["studies"] == count("SELECT count(*) FROM audit_events WHERE action = ?",
                                     "study.create")
        assert n["data_versions"] == sum(events("data.upload").values()), n
        assert n["fits"] == sum(events("fit.create").values()), n
        assert n["signatures"] == sum(sum(events(a).values()) for a in SIGNATURE_ACTIONS), n
        fit_state = dict(con.execute("SELECT id, state FROM fits"))
        submits, approvals = events("fit.submit"), events("fit.approve")
        supersessions = events("fit.supersede")
        approving = Counter(r[0] for r in con.execute(
            "SELECT fit_id FROM signatures WHERE meaning = ?", (reviews.APPROVE,)))
        for fit_id, state in fit_state.items():
            moved = state in NOT_DRAFT
            assert submits[fit_id] == int(moved), (fit_id, state, submits[fit_id])
            signed = int(state in ("approved", "superseded", "withdrawn"))
            assert approving[fit_id] == signed, (fit_id, state, approving[fit_id])
            assert approvals[fit_id] == signed, (fit_id, state, approvals[fit_id])
            assert supersessions[fit_id] == int(state == "superseded"), (fit_id, state)
        assert sum(submits.values()) == sum(s in NOT_DRAFT for s in fit_state.values())
        assert sum(approvals.values()) == sum(approving.values())
        live = count("SELECT max(c) FROM (SELECT count(*) AS c FROM fits WHERE state = "
                     "'approved' GROUP BY study_id, response)")
        assert (live or 0) <= 1, "two approved fits of the same study and response"
        # What the server acknowledged with 2xx is still stored.
        versions = {r[0] for r in con.execute("SELECT id FROM data_versions")}
        assert acknowledged["upload"] <= versions
        assert acknowledged["fit"] <= set(fit_state)
        assert all(fit_state[f] in NOT_DRAFT for f in acknowledged["submit"])
        assert all(approving[f] == 1 for f in acknowledged["sign"])
    report = check_file(db_path)  # PRAGMA integrity_check and the audit chain, as for backups
    assert report.integrity == "ok", report.integrity
    assert report.chain.ok, report.chain.describe()
    assert report.chain.checked == n["audit_events"]
    return n


class Driver:
    """Chooses each next operation from the study as the API reports it, and sends it."""

    def __init__(self, server: Server, tokens: dict[str, str], study_id: int,
                 rng: random.Random):
        self.server, self.tokens, self.study_id, self.rng = server, tokens, study_id, rng
        self.csv = DEMO_CSV.read_bytes()

    def state(self) -> dict[str, Any]:
        status, body = request(self.server.port, "GET", f"/api/v1/studies/{self.study_id}",
                               token=self.tokens["erin"])
        assert status == 200, body
        return body

    def choose(self, state: dict[str, Any]) -> tuple[str, dict[str, Any]]:
        """(kind, target) for the next operation."""
        if not state["data_versions"]:
            return "upload", {}
        latest = max(state["data_versions"], key=lambda v: v["version"])
        mine = [f for f in state["fits"] if f["data_version_id"] == latest["id"]]
        for kind, waiting in (("sign", "submitted"), ("submit", "draft")):
            ready = [f for f in mine if f["state"] == waiting]
            if ready:
                return kind, ready[0]
        if self.rng.random() < UPLOAD_SHARE:
            return "upload", {}
        return "fit", latest

    def send(self, kind: str, target: dict[str, Any], n_versions: int) -> tuple[int, Any]:
        port, erin = self.server.port, self.tokens["erin"]
        if kind == "upload":
            fields = {"roles": ROLES_JSON}
            if n_versions:
                fields["reason"] = f"panels re-measured (version {n_versions + 1})"
            body, ctype = multipart(fields, DEMO_CSV.name, self.csv)
            return request(port, "POST", f"/api/v1/studies/{self.study_id}/data", token=erin,
                           body=body, content_type=ctype)
        if kind == "fit":
            body = {"response": "Hardness", "model": "quadratic"}
            path = f"/api/v1/data/{target['id']}/fits"
        elif kind == "submit":
            body, path = {}, f"/api/v1/fits/{target['id']}/submit"
        else:
            body = {"meaning": reviews.APPROVE, "password": PASSWORDS["abel"],
                    "comment": "residual checks reviewed"}
            path = f"/api/v1/fits/{target['id']}/signatures"
            return request(port, "POST", path, token=self.tokens["abel"],
                           body=json.dumps(body).encode(), content_type="application/json")
        return request(port, "POST", path, token=erin, body=json.dumps(body).encode(),
                       content_type="application/json")


def kill_delay(rng: random.Random, seen: list[float], aim: bool = False) -> float:
    """Seconds from an operation's start to the SIGKILL (see SCALED_SHARE and AIMED_FRACTION)."""
    scaled, fraction = rng.random() < SCALED_SHARE, rng.uniform(*SCALED_FRACTION)
    fixed = rng.uniform(*KILL_DELAY_S)
    if aim:
        return rng.uniform(*AIMED_FRACTION) * sorted(seen)[len(seen) // 2]
    if scaled and len(seen) >= 3:
        return fraction * sorted(seen)[len(seen) // 2]
    return fixed


def _outcome(kind: str, target: dict[str, Any], before: dict[str, Any],
             after: dict[str, Any]) -> bool:
    """Did an interrupted operation take effect? (The database checks say it was whole.)"""
    if kind == "upload":
        grew = len(after["data_versions"]) - len(before["data_versions"])
    elif kind == "fit":
        grew = len(after["fits"]) - len(before["fits"])
    else:
        now = next(f["state"] for f in after["fits"] if f["id"] == target["id"])
        grew = int(now != target["state"])
    assert grew in (0, 1), (kind, grew)
    return bool(grew)


@pytest.mark.slow
def test_sigkill_during_upload_fit_and_sign_operations(tmp_path):
    rng = random.Random(SEED)
    db_path = tmp_path / "crash.db"
    env, tokens, study_id = prepare(db_path, tmp_path / "instance")
    server = Server(env, tmp_path / "server.log")
    driver = Driver(server, tokens, study_id, rng)
    attempted, completed, refused = Counter(), Counter(), []
    interrupted, took_effect, latency = Counter(), Counter(), {k: [] for k in KINDS}
    acknowledged: dict[str, set[int]] = {k: set() for k in KINDS}
    kills = between = 0
    checks = []
    hang_guard = time.monotonic() + HANG_GUARD_S

    def after_kill(restart: bool = True) -> dict[str, Any] | None:
        nonlocal kills
        assert server.wait_dead() == -signal.SIGKILL, "the server died of something else"
        kills += 1
        checks.append(check_database(db_path, acknowledged))
        server.timer = None
        if not restart:
            return None
        server.start()
        return driver.state()

    try:
        server.start()
        state = driver.state()
        # How many kills 200 operations bring depends on timing (a pending kill spans as many
        # operations as fit in its delay), so the run goes on until it has had enough of both.
        for _ in range(MAX_OPERATIONS + 2 * MAX_KILLS):
            done = sum(attempted.values())
            enough = (done >= OPERATIONS and kills >= MIN_KILLS
                      and sum(interrupted.values()) >= MIN_INSIDE
                      and all(interrupted[k] >= 1 for k in KINDS))
            if enough or done >= MAX_OPERATIONS or time.monotonic() > hang_guard:
                break
            kind, target = driver.choose(state)
            # A kind that no kill has caught inside yet (uploads are short and rarer) gets an
            # aimed kill: a fraction of its own median duration, so every kind is interrupted.
            aim = interrupted[kind] == 0 and len(latency[kind]) >= 3
            if (not server.armed and kills < MAX_KILLS
                    and rng.random() < (AIMED_CHANCE if aim else KILL_CHANCE)):
                server.arm(kill_delay(rng, latency[kind], aim=aim))
            attempted[kind] += 1
            before, t0 = state, time.perf_counter()
            try:
                status, body = driver.send(kind, target, len(state["data_versions"]))
            except (OSError, http.client.HTTPException):
                assert server.kill_sent.is_set(), "request failed without a kill"
                interrupted[kind] += 1
                state = after_kill()
                took_effect[kind] += _outcome(kind, target, before, state)
                continue
            latency[kind].append(time.perf_counter() - t0)
            if status in (200, 201):
                completed[kind] += 1
                acknowledged[kind].add(body["fit_id"] if kind == "sign" else body["id"])
            else:
                refused.append((kind, status, body))
            try:
                state = driver.state()
            except (OSError, http.client.HTTPException):
                assert server.kill_sent.is_set(), "request failed without a kill"
                between += 1
                state = after_kill()
        if server.timer is not None:  # a kill still pending at the end lands now
            server.timer.cancel()
            if server.kill_sent.is_set():
                after_kill(restart=False)
    finally:
        server.stop()
    final = check_database(db_path, acknowledged)

    def per_kind(c: Counter) -> str:
        return " ".join(f"{k}={c[k]}" for k in KINDS)

    median_ms = {k: round(1000 * sorted(v)[len(v) // 2]) if v else None
                 for k, v in latency.items()}
    print(f"\ncrash test: {sum(attempted.values())} operations attempted ({per_kind(attempted)})"
          f"; completed {per_kind(completed)}; {kills} SIGKILLs, {sum(interrupted.values())} "
          f"inside an operation ({per_kind(interrupted)}; took effect {per_kind(took_effect)})"
          f", {between} between operations; {len(checks)} post-kill checks passed "
          f"(integrity ok, chain verified, counts paired); final rows {final}; median ms "
          f"{median_ms}")
    assert not refused, refused[:3]
    assert time.monotonic() <= hang_guard, "stopped by the hang guard"
    assert sum(attempted.values()) >= OPERATIONS
    assert kills >= MIN_KILLS and len(checks) == kills
    assert sum(interrupted.values()) >= MIN_INSIDE, "kills should mostly land inside requests"
    assert all(interrupted[k] >= 1 for k in KINDS), interrupted
    for kind, least in (("upload", 10), ("fit", 25), ("submit", 25), ("sign", 25)):
        assert completed[kind] >= least, (kind, completed[kind])
    assert final["data_versions"] >= completed["upload"]
    assert final["signatures"] >= completed["sign"]
    _checks_catch_half_done_operations(db_path, tmp_path, acknowledged)


def _checks_catch_half_done_operations(db_path: Path, tmp_path: Path,
                                       acknowledged: dict[str, set[int]]) -> None:
    """Each kind of half-written operation, made by hand on a copy, fails check_database."""
    signed = "(SELECT max(fit_id) FROM signatures)"
    halves = {
        "a signature row without its event": "DELETE FROM signatures WHERE id = "
                                             "(SELECT max(id) FROM signatures)",
        "an approval undone without its events": f"UPDATE fits SET state = 'submitted' "
                                                 f"WHERE id = {signed}",
        "a submit undone without its event": f"UPDATE fits SET state = 'draft' WHERE id = "
                                             f"{signed}",
        "a fit row without its event": None,
    }
    for number, (name, sql) in enumerate(halves.items()):
        copy = tmp_path / f"half-{number}.db"
        with closing(sqlite3.connect(db_path)) as src, closing(sqlite3.connect(copy)) as dst:
            src.backup(dst)
            # Removing a signature as a database writer would: its guarding trigger goes first.
            dst.execute("DROP TRIGGER IF EXISTS signatures_no_delete")
            if sql is None:
                columns = ", ".join(r[1] for r in dst.execute("PRAGMA table_info(fits)")
                                    if r[1] != "id")
                sql = (f"INSERT INTO fits ({columns}) SELECT {columns} FROM fits "  # noqa: S608
                       "WHERE id = (SELECT max(id) FROM fits)")
            assert dst.execute(sql).rowcount == 1, name
            dst.commit()
        try:
            check_database(copy, acknowledged)
        except AssertionError:
            continue
        raise AssertionError(f"check_database missed: {name}")
