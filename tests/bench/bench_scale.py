"""Scale benchmark (not a test; run by `make bench`): the CLI and the server at 100,000 runs.

1. ``plumbline check`` on 10,000- and 100,000-run × 5-factor CSVs, full quadratic, against the
   scripting anchor (tests/bench/scripting_anchor.py: pandas, statsmodels, the closed forms) on
   the 100,000-run file in the same run: wall time and peak memory (GNU time), best of
   ``BENCH_REPEATS``; the ratios, and t(100k) / t(10k) for the CLI.
2. Through the real server (``plumbline serve`` on loopback, fresh SQLite database): for 60, 10,000
   and 100,000 runs, upload (API), fit (API), the fit API document's size, and the fit page in
   Chromium until every chart is drawn (load time, bytes transferred); then a second 100,000-run
   fit and its page, and the server's resident memory after both.

Targets (issue "Fast at any size"): CLI ≤ 1.0 × the anchor's wall time and peak memory; fit API
document ≤ 2 MB; the 100k fit page ≤ 5 MB transferred and ≤ 4 × the 60-run page's load time;
server RSS ≤ 1.5 GB after two 100k fits and their pages; t(100k) / t(10k) ≤ 12.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
import uuid
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parents[1]))

from bench_analysis import big_frame  # noqa: E402

BIN = Path(sys.executable).parent
REPEATS = int(os.environ.get("BENCH_REPEATS", "2"))
FACTORS = ["X1", "X2", "X3", "X4", "X5"]
MB = 1024 * 1024
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--no-first-run",
                 "--disable-background-networking", "--disable-dev-shm-usage"]


def timed(command: list[str], env: dict | None = None) -> tuple[float, float]:
    """(wall seconds, peak resident MB) of a command, by GNU time; best of REPEATS."""
    best = (float("inf"), float("inf"))
    for _ in range(REPEATS):
        out = subprocess.run(["/usr/bin/time", "-f", "TIMED %e %M", *command], env=env,
                             capture_output=True, text=True, check=False)
        if out.returncode != 0:
            raise SystemExit(f"{command[0]} failed: {out.stderr[-800:]}")
        line = next(x for x in out.stderr.splitlines() if x.startswith("TIMED "))
        wall, kb = line.split()[1:]
        best = (min(best[0], float(wall)), min(best[1], int(kb) / 1024))
    return best


def cli(files: dict[int, Path]) -> dict[str, float]:
    check = [str(BIN / "plumbline"), "check", "--response", "Y", "--factors", ",".join(FACTORS),
             "--run-order", "order", "--model", "quadratic"]
    anchor = timed([sys.executable, str(HERE / "scripting_anchor.py"), str(files[100_000]), "Y",
                    "order", *FACTORS])
    ours = {n: timed([*check[:2], str(files[n]), *check[2:]]) for n in (10_000, 100_000)}
    print(f"CLI, {100_000:,} runs x 5 factors, full quadratic, whole battery (best of {REPEATS}):")
    print(f"  plumbline check   {ours[100_000][0]:6.2f} s  {ours[100_000][1]:7.0f} MB peak")
    print(f"  scripting anchor  {anchor[0]:6.2f} s  {anchor[1]:7.0f} MB peak")
    wall, mem = ours[100_000][0] / anchor[0], ours[100_000][1] / anchor[1]
    print(f"  ratio wall {wall:.2f} (target <= 1.0), peak memory {mem:.2f} (target <= 1.0)")
    scale = ours[100_000][0] / ours[10_000][0]
    print(f"  t(100k)/t(10k) = {scale:.2f} (10k: {ours[10_000][0]:.2f} s; target <= 12)")
    return {"cli_wall_ratio": wall, "cli_memory_ratio": mem, "cli_scale": scale}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _prepare(env: dict[str, str]) -> str:
    code = """
from app import create_app
from app.store.db import database
from app.workflow import accounts
app = create_app()
with database(app).transaction() as s:
    u = accounts.create_user(s, None, username="scale", full_name="Scale Bench",
                             roles="engineer", password="scale bench pass phrase 2026")
    _row, raw = accounts.create_token(s, None, u, "bench")
    print(raw)
"""
    subprocess.run([str(BIN / "plumbline"), "db", "upgrade"], env=env, check=True,
                   capture_output=True)
    return subprocess.run([sys.executable, "-c", code], env=env, check=True,
                          capture_output=True, text=True).stdout.split()[-1]


class Api:
    def __init__(self, base: str, token: str):
        self.base, self.token = base, token

    def call(self, method: str, path: str, body: bytes | None = None,
             content_type: str = "application/json") -> tuple[int, bytes]:
        req = urllib.request.Request(self.base + path, data=body, method=method, headers={
            "Authorization": f"Bearer {self.token}", "Content-Type": content_type})
        try:
            with urllib.request.urlopen(req, timeout=600) as resp:  # noqa: S310 (loopback)
                return resp.status, resp.read()
        except urllib.error.HTTPError as err:
            return err.code, err.read()

    def upload(self, study: int, path: Path, roles: dict) -> int:
        boundary = uuid.uuid4().hex
        parts = [f"--{boundary}\r\nContent-Disposition: form-data; name=\"roles\"\r\n\r\n"
                 f"{json.dumps(roles)}\r\n".encode(),
                 f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
                 f"filename=\"{path.name}\"\r\nContent-Type: text/csv\r\n\r\n".encode(),
                 path.read_bytes(), f"\r\n--{boundary}--\r\n".encode()]
        status, body = self.call("POST", f"/api/v1/studies/{study}/data", b"".join(parts),
                                 f"multipart/form-data; boundary={boundary}")
        if status != 201:
            raise SystemExit(f"upload refused ({status}): {body[:500]!r}")
        return json.loads(body)["id"]


def _rss(pid: int) -> tuple[float, float]:
    """(current, peak) resident MB of a process (Linux /proc)."""
    fields = dict(line.split(":", 1) for line in Path(f"/proc/{pid}/status").read_text()
                  .splitlines() if ":" in line)
    return (int(fields["VmRSS"].split()[0]) / 1024, int(fields["VmHWM"].split()[0]) / 1024)


def _page(browser, base: str, fit_id: int) -> tuple[float, float, int]:
    """(seconds until every chart is drawn, MB transferred, charts) for a fresh visit."""
    context = browser.new_context()
    page = context.new_page()
    page.goto(base + "/login")
    page.fill("input[name=username]", "scale")
    page.fill("input[name=password]", "scale bench pass phrase 2026")
    page.click("button[type=submit]")
    page.wait_for_load_state("networkidle")
    sizes: list[int] = []
    page.on("requestfinished", lambda r: sizes.append(r.sizes()["responseBodySize"]
                                                       + r.sizes()["responseHeadersSize"]))
    t0 = time.perf_counter()
    page.goto(f"{base}/fits/{fit_id}")
    page.wait_for_function(
        "() => { const f = document.querySelectorAll('#chart-grid figure');"
        " return f.length > 0 && document.querySelectorAll("
        "'#chart-grid figure.rendered, #chart-grid figure.failed').length === f.length; }",
        timeout=300_000)
    elapsed = time.perf_counter() - t0
    failed = page.eval_on_selector_all("#chart-grid figure.failed", "f => f.length")
    charts = page.eval_on_selector_all("#chart-grid figure.rendered", "f => f.length")
    page.wait_for_load_state("networkidle")
    context.close()
    if failed:
        raise SystemExit(f"fit {fit_id}: {failed} charts failed to draw")
    return elapsed, sum(sizes) / MB, charts


def server(files: dict[int, Path], shots: Path | None) -> dict[str, float]:
    from playwright.sync_api import sync_playwright

    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:
        print("server at scale: skipped (no chromium on PATH)")
        return {}
    roles = {"order": {"role": "run_order"}, "Y": {"role": "response"},
             **{f: {"role": "factor"} for f in FACTORS}}
    out: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as tmp:
        env = {**os.environ, "PLUMBLINE_INSTANCE_PATH": tmp,
               "PLUMBLINE_DATABASE_URL": f"sqlite:///{tmp}/scale.db"}
        token = _prepare(env)
        port = _free_port()
        log = open(Path(tmp) / "server.log", "wb")  # noqa: SIM115
        proc = subprocess.Popen([str(BIN / "plumbline"), "serve", "--host", "127.0.0.1",
                                 "--port", str(port)], env=env, stdout=subprocess.DEVNULL,
                                stderr=log)
        base = f"http://127.0.0.1:{port}"
        try:
            for _ in range(200):
                try:
                    socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                    break
                except OSError:
                    time.sleep(0.1)
            api = Api(base, token)
            print(f"Server (plumbline serve, SQLite), start RSS {_rss(proc.pid)[0]:.0f} MB:")
            print(f"  {'runs':>8} {'upload s':>9} {'fit s':>7} {'API doc MB':>11} "
                  f"{'page s':>7} {'page MB':>8} {'charts':>7} {'server RSS MB':>14}")
            with sync_playwright() as pw:
                browser = pw.chromium.launch(executable_path=chromium, headless=True,
                                             args=CHROMIUM_ARGS)
                rows = {}
                for label, n in (("60", 60), ("10k", 10_000), ("100k", 100_000),
                                 ("100k again", 100_000)):
                    status, body = api.call("POST", "/api/v1/studies", json.dumps(
                        {"title": f"Scale bench, {label} runs", "purpose": "bench"}).encode())
                    t0 = time.perf_counter()
                    version = api.upload(json.loads(body)["id"], files[n], roles)
                    t1 = time.perf_counter()
                    status, body = api.call("POST", f"/api/v1/data/{version}/fits", json.dumps(
                        {"response": "Y", "model": "quadratic"}).encode())
                    if status != 201:
                        raise SystemExit(f"fit refused ({status}): {body[:300]!r}")
                    fit_id = json.loads(body)["id"]
                    t2 = time.perf_counter()
                    _, doc = api.call("GET", f"/api/v1/fits/{fit_id}")
                    page_s, page_mb, charts = _page(browser, base, fit_id)
                    rss = _rss(proc.pid)[0]
                    rows[label] = (t1 - t0, t2 - t1, len(doc) / MB, page_s, page_mb, rss)
                    print(f"  {label:>10} {t1 - t0:>7.2f} {t2 - t1:>7.2f} {len(doc) / MB:>11.3f} "
                          f"{page_s:>7.2f} {page_mb:>8.2f} {charts:>7} {rss:>14.0f}", flush=True)
                    if shots is not None and n == 100_000 and label == "100k":
                        _shoot(browser, base, fit_id, shots / "fit-100k.png")
                browser.close()
            rss, peak = _rss(proc.pid)
        finally:
            proc.terminate()
            proc.wait(timeout=20)
            log.close()
    doc_mb = max(r[2] for r in rows.values())
    page_ratio = rows["100k"][3] / rows["60"][3]
    total = {k: sum(rows[k][:2]) + rows[k][3] for k in rows}
    print(f"  fit API document: largest {doc_mb:.3f} MB (target <= 2 MB)")
    print(f"  100k fit page: {rows['100k'][4]:.2f} MB transferred (target <= 5 MB), load "
          f"{page_ratio:.2f} x the 60-run page's (target <= 4)")
    print(f"  server RSS after two 100k fits and their pages: {rss:.0f} MB (peak {peak:.0f} MB; "
          "target <= 1536 MB)")
    print(f"  upload + fit + page, t(100k)/t(10k) = {total['100k'] / total['10k']:.2f} "
          "(target <= 12)")
    out.update(doc_mb=doc_mb, page_ratio=page_ratio, rss=rss)
    return out


def _shoot(browser, base: str, fit_id: int, path: Path) -> None:
    context = browser.new_context(viewport={"width": 1400, "height": 1000})
    page = context.new_page()
    page.goto(base + "/login")
    page.fill("input[name=username]", "scale")
    page.fill("input[name=password]", "scale bench pass phrase 2026")
    page.click("button[type=submit]")
    page.goto(f"{base}/fits/{fit_id}#charts")
    page.wait_for_function("() => window.plumblineCharts && "
                           "document.querySelectorAll('#chart-grid figure.rendered').length > 3",
                           timeout=300_000)
    page.wait_for_timeout(1500)
    page.screenshot(path=str(path), full_page=True)
    page.locator("#charts").screenshot(path=str(path.with_name(path.stem + "-charts.png")))
    context.close()
    print(f"  screenshot: {path}")


def main() -> int:
    shots = Path(os.environ["BENCH_SHOTS"]) if os.environ.get("BENCH_SHOTS") else None
    with tempfile.TemporaryDirectory() as tmp:
        files = {}
        for n in (60, 10_000, 100_000):
            files[n] = Path(tmp) / f"scale-{n}.csv"
            big_frame(n).to_csv(files[n], index=False)
        cli(files)
        server(files, shots)
    return 0


if __name__ == "__main__":
    sys.exit(main())
