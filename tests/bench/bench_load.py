"""Load benchmark against the real server (waitress) on loopback.

Starts `plumbline serve` (its default thread count) on a free 127.0.0.1 port with a fresh SQLite
database holding the demo scenario and one fit, then drives it with 16 concurrent keep-alive
clients. Request counts and duration are bounded. Reports p50, p95, throughput and the server's
CPU time per request for login, the study page and the fit page beside a trivial baseline route
(/healthz, asked by anonymous clients) measured in the same run, and the p95 ratios. The routes
take turns in rounds, so a slow spell of a shared machine falls on all of them alike.
Target (issue "Fast at any size"): study and fit pages' p95 ≤ 3 × the baseline's p95 at 16
clients.

Before the timed rounds every client asks every route once (warm-up; the first request of each
route is timed and printed on its own). Clients send Accept-Encoding: gzip, deflate as browsers
do (the study and fit pages then come compressed; the bytes are read, not decompressed).

Knobs: BENCH_REQUESTS (per route, 800), BENCH_LOGINS (64), BENCH_CLIENTS (16), BENCH_THREADS
(server threads; default: what `plumbline serve` uses).
"""

from __future__ import annotations

import http.client
import os
import re
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from urllib.parse import urlencode

# The CLI and interpreter of the environment running the benchmark.
BIN = Path(sys.executable).parent
CLIENTS = int(os.environ.get("BENCH_CLIENTS", "16"))
REQUESTS_PER_ROUTE = int(os.environ.get("BENCH_REQUESTS", "800"))
LOGIN_REQUESTS = int(os.environ.get("BENCH_LOGINS", "64"))
MAX_SECONDS_PER_ROUTE = 60.0
ROUNDS = 4
# The server as `plumbline serve` runs it (8 threads) unless BENCH_THREADS says otherwise.
THREADS = os.environ.get("BENCH_THREADS")
PASSWORD = "bench pass phrase for loopback only"  # noqa: S105


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _prepare(env: dict[str, str]) -> tuple[int, int]:
    """Demo studies, a bench user and one fit; returns (study id, fit id)."""
    code = f"""
from sqlalchemy import select
from app import create_app
from app.store.db import database
from app.store.models import DataVersion, User
from app.workflow import accounts, fits, studies, teams
from app.analysis import Thresholds
from app.demo import load_demo
app = create_app()
load_demo(app)
with database(app).transaction() as s:
    u = accounts.create_user(s, None, username="bench", full_name="Bench User",
                             roles="engineer", password={PASSWORD!r})
    v = s.scalar(select(DataVersion).order_by(DataVersion.id))
    teams.add_member(s, v.study.owner, v.study, "bench")  # the demo engineer's study
    spec = fits.build_spec(v, response="Hardness", model="quadratic", thresholds=Thresholds())
    f = fits.create_fit(s, u, v, spec)
    print(v.study_id, f.id)
"""
    subprocess.run([str(BIN / "plumbline"), "db", "upgrade"], env=env, check=True,
                   capture_output=True)
    out = subprocess.run([sys.executable, "-c", code], env=env, check=True,
                         capture_output=True, text=True).stdout.split()
    return int(out[-2]), int(out[-1])


class Client:
    def __init__(self, port: int):
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
        self.cookie = ""

    def request(self, method: str, path: str, body: str | None = None) -> tuple[int, bytes]:
        # As a browser asks: every browser accepts gzip (pages cached whole are sent that way).
        headers = {"Accept-Encoding": "gzip, deflate"}
        if self.cookie:
            headers["Cookie"] = self.cookie
        if body is not None:
            headers["Content-Type"] = "application/x-www-form-urlencoded"
        self.conn.request(method, path, body=body, headers=headers)
        resp = self.conn.getresponse()
        data = resp.read()
        for header, value in resp.getheaders():
            if header.lower() == "set-cookie":
                self.cookie = value.split(";", 1)[0]
        return resp.status, data

    def login(self) -> int:
        self.cookie = ""  # a fresh visitor each time: the login page shows its form
        _, page = self.request("GET", "/login")
        token = re.search(rb'name="csrf_token" value="([^"]+)"', page).group(1).decode()
        status, _ = self.request("POST", "/login", urlencode(
            {"username": "bench", "password": PASSWORD, "csrf_token": token}))
        return status


def _drive(clients: list[Client], total: int, action) -> dict:
    """``total`` requests of ``action`` spread over the clients; latencies and elapsed time."""
    latencies: list[float] = []
    errors = []
    lock = threading.Lock()
    counter = iter(range(total))
    deadline = time.perf_counter() + MAX_SECONDS_PER_ROUTE / ROUNDS

    def work(client: Client):
        while time.perf_counter() < deadline:
            with lock:
                if next(counter, None) is None:
                    return
            t0 = time.perf_counter()
            try:
                status = action(client)
            except (OSError, http.client.HTTPException) as exc:
                status = f"{type(exc).__name__}: {exc}"
                client.conn.close()
            dt = time.perf_counter() - t0
            with lock:
                latencies.append(dt)
                if status not in (200, 302):
                    errors.append(status)

    start = time.perf_counter()
    threads = [threading.Thread(target=work, args=(c,)) for c in clients]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return {"latencies": latencies, "errors": errors, "elapsed": time.perf_counter() - start}


def _summary(parts: list[dict]) -> dict:
    latencies = sorted(x for p in parts for x in p["latencies"])
    errors = [e for p in parts for e in p["errors"]]
    if errors:
        print(f"  first errors: {errors[:3]}", flush=True)
    if not latencies:
        raise SystemExit("no request completed")
    return {"n": len(latencies), "errors": len(errors),
            "p50_ms": 1000 * statistics.median(latencies),
            "p95_ms": 1000 * latencies[max(0, int(0.95 * len(latencies)) - 1)],
            "throughput": len(latencies) / sum(p["elapsed"] for p in parts),
            "cpu_ms": 1000 * sum(p.get("server_cpu", 0.0) for p in parts) / len(latencies)}


def _cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far (Linux /proc; 0 where there is none)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        env = {**os.environ, "PLUMBLINE_INSTANCE_PATH": tmp,
               "PLUMBLINE_DATABASE_URL": f"sqlite:///{tmp}/bench.db"}
        study_id, fit_id = _prepare(env)
        port = _free_port()
        # A file, not a pipe: nobody reads a pipe during the run, and once its buffer is full
        # the server's next log line (waitress warns when requests queue) blocks every thread.
        server_log = open(Path(tmp) / "server.log", "wb")  # noqa: SIM115
        command = [str(BIN / "plumbline"), "serve", "--host", "127.0.0.1",
                   "--port", str(port)] + (["--threads", THREADS] if THREADS else [])
        server = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=server_log)
        try:
            for _ in range(100):
                try:
                    socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                    break
                except OSError:
                    time.sleep(0.1)
            clients = [Client(port) for _ in range(CLIENTS)]
            # The baseline is the cheapest request there is: anonymous clients (no session to
            # look up) on a route that answers a constant. Pages are asked by signed-in clients.
            anonymous = [Client(port) for _ in range(CLIENTS)]
            routes = {
                "baseline /healthz": (anonymous, lambda c: c.request("GET", "/healthz")[0]),
                "study page": (clients, lambda c: c.request("GET", f"/studies/{study_id}")[0]),
                "fit page": (clients, lambda c: c.request("GET", f"/fits/{fit_id}")[0]),
            }
            login = _summary([_drive(clients, LOGIN_REQUESTS, Client.login)])
            for c in clients:
                if c.login() != 302:
                    raise SystemExit("bench user could not sign in")
            # Warm-up, not timed in the rounds: each client asks each route once, so that the
            # rounds measure the steady state (pages served from the page cache) and not the
            # one-off first rendering, which is timed and printed on its own.
            cold = {}
            for name, (who, action) in routes.items():
                started = time.perf_counter()
                action(who[0])
                cold[name] = (time.perf_counter() - started) * 1000
                for c in who[1:]:
                    action(c)
            # Rounds take turns, so that a slow spell of the machine falls on every route
            # alike instead of on whichever route was running at the time.
            parts: dict[str, list[dict]] = {name: [] for name in routes}
            for _ in range(ROUNDS):
                for name, (who, action) in routes.items():
                    cpu = _cpu_seconds(server.pid)
                    part = _drive(who, REQUESTS_PER_ROUTE // ROUNDS, action)
                    part["server_cpu"] = _cpu_seconds(server.pid) - cpu
                    parts[name].append(part)
            results = {name: _summary(p) for name, p in parts.items()}
            results["login (argon2id)"] = login
        finally:
            server.terminate()
            server.wait(timeout=10)
            server_log.close()
    base = results["baseline /healthz"]["p95_ms"]
    print(f"load benchmark: {CLIENTS} concurrent clients on 127.0.0.1 (plumbline serve, "
          f"{THREADS or 'default'} threads), {ROUNDS} rounds taking turns")
    print(f"{'route':<20}{'requests':>9}{'errors':>8}{'p50 ms':>9}{'p95 ms':>9}"
          f"{'req/s':>9}{'p95/base':>10}{'server CPU ms/req':>19}")
    for name, r in results.items():
        print(f"{name:<20}{r['n']:>9}{r['errors']:>8}{r['p50_ms']:>9.1f}{r['p95_ms']:>9.1f}"
              f"{r['throughput']:>9.1f}{r['p95_ms'] / base:>10.2f}{r['cpu_ms']:>19.2f}")
    print("first request of each route (one-off rendering, not in the rounds): "
          + ", ".join(f"{name} {ms:.0f} ms" for name, ms in cold.items()))
    ok = all(results[k]["p95_ms"] <= 3 * base for k in ("study page", "fit page"))
    print(f"target study/fit p95 <= 3 x baseline p95: {'met' if ok else 'NOT met'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
