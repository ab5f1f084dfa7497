"""The plumbline command: database, users, tokens, demo."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest
from sqlalchemy import create_engine, func, select, update
from sqlalchemy.orm import Session

from app.cli import main
from app.store.models import ApiToken, AuditEvent, DataVersion, Study, User


def _query(url, stmt):
    engine = create_engine(url)
    with Session(engine) as s:
        value = s.execute(stmt).all()
    engine.dispose()
    return value


def test_users_lifecycle(cli_env):
    runner, url = cli_env
    added = runner.invoke(main, ["users", "add", "mkade", "--name", "Mara Kade", "--roles",
                                 "engineer,approver", "--password-stdin"],
                          input="a sufficiently long phrase\n")
    assert added.exit_code == 0, added.output
    assert "approver,engineer" in added.output
    listed = runner.invoke(main, ["users", "list"])
    assert "mkade\tMara Kade\tapprover,engineer\tactive" in listed.output
    assert runner.invoke(main, ["users", "set-roles", "mkade", "auditor"]).exit_code == 0
    assert runner.invoke(main, ["users", "deactivate", "mkade"]).exit_code == 0
    rows = _query(url, select(User.roles, User.active).where(User.username == "mkade"))
    assert rows == [("auditor", False)]


def test_users_unlock_ends_a_signing_lock(cli_env):
    runner, url = cli_env
    added = runner.invoke(main, ["users", "add", "abel", "--name", "Abel Approver", "--roles",
                                 "approver", "--password-stdin"],
                          input="a sufficiently long phrase\n")
    assert added.exit_code == 0, added.output
    engine = create_engine(url)
    with Session(engine) as s, s.begin():
        s.execute(update(User).where(User.username == "abel").values(reauth_failures=5,
                  reauth_locked_until=datetime.now(UTC) + timedelta(minutes=15)))
    engine.dispose()
    result = runner.invoke(main, ["users", "unlock", "abel"])
    assert result.exit_code == 0 and "unlocked" in result.output
    rows = _query(url, select(User.reauth_failures, User.reauth_locked_until)
                  .where(User.username == "abel"))
    assert rows == [(0, None)]
    assert runner.invoke(main, ["users", "unlock", "ghost"]).exit_code == 2


def test_users_rename_keeps_printed_names_unique(cli_env):
    runner, url = cli_env
    for username, name in (("abel", "Abel Approver"), ("ada", "Ada Approver")):
        added = runner.invoke(main, ["users", "add", username, "--name", name, "--roles",
                                     "approver", "--password-stdin"],
                              input="a sufficiently long phrase\n")
        assert added.exit_code == 0, added.output
    taken = runner.invoke(main, ["users", "rename", "ada", "--name", "ABEL approver"])
    assert taken.exit_code == 2 and "already has the printed name" in taken.output
    renamed = runner.invoke(main, ["users", "rename", "ada", "--name", "Ada Okafor"])
    assert renamed.exit_code == 0 and "ada: Ada Okafor" in renamed.output
    both = runner.invoke(main, ["users", "add", "max", "--name", "Max", "--roles",
                                "admin,approver", "--password-stdin"],
                         input="a sufficiently long phrase\n")
    assert both.exit_code == 2 and "admin and the approver" in both.output


@pytest.mark.parametrize("args, stdin, message", [
    (["users", "add", "x1", "--name", "X", "--roles", "engineer", "--password-stdin"],
     "short\n", "at least 8"),
    (["users", "add", "x2", "--name", "X", "--roles", "wizard", "--password-stdin"],
     "long enough password\n", "Unknown role"),
    (["users", "add", "x3", "--name", "X", "--roles", "engineer", "--password-stdin"],
     "password123\n", "commonly used"),
    (["users", "set-roles", "ghost", "engineer"], None, "No user named 'ghost'"),
])
def test_bad_cli_input_exits_2_with_a_message(cli_env, args, stdin, message):
    runner, _ = cli_env
    result = runner.invoke(main, args, input=stdin)
    assert result.exit_code == 2
    assert message in result.output


def test_tokens_create_prints_a_token_stored_only_as_hash(cli_env):
    runner, url = cli_env
    runner.invoke(main, ["users", "add", "tok", "--name", "T", "--roles", "engineer",
                         "--password-stdin"], input="another long phrase\n")
    result = runner.invoke(main, ["tokens", "create", "tok"])
    raw = result.output.strip()
    assert result.exit_code == 0 and raw.startswith("plb_")
    stored = _query(url, select(ApiToken.token_sha256, ApiToken.prefix))
    import hashlib

    assert stored == [(hashlib.sha256(raw.encode()).hexdigest(), raw[:10])]


def test_demo_load_once(cli_env):
    runner, url = cli_env
    first = runner.invoke(main, ["demo", "load", "--if-empty"])
    assert first.exit_code == 0, first.output
    assert "one-time passwords, shown only now" in first.output
    # The accounts come last, framed: the last lines are the box around them.
    tail = first.output.rstrip().splitlines()
    assert tail[-1].startswith("+-") and tail[-2].startswith("| Each person must choose")
    second = runner.invoke(main, ["demo", "load", "--if-empty"])
    assert "already has users" in second.output
    assert _query(url, select(func.count()).select_from(Study)) == [(2,)]
    assert _query(url, select(func.count()).select_from(DataVersion)) == [(2,)]
    users = _query(url, select(User.username, User.must_change_password).order_by(User.username))
    assert len(users) == 3 and all(flag for _, flag in users)


def test_backup_and_restore_check_integrity_and_chain(cli_env, tmp_path):
    runner, url = cli_env
    runner.invoke(main, ["demo", "load"])
    target = tmp_path / "backup.db"
    result = runner.invoke(main, ["backup", str(target)])
    assert result.exit_code == 0, result.output
    assert "integrity ok" in result.output and "chain intact" in result.output
    # Work after the backup is lost on restore: the restored chain is the backup's.
    runner.invoke(main, ["users", "set-roles", "imarwick", "engineer,auditor"])
    restored = runner.invoke(main, ["restore", str(target), "--yes"])
    assert restored.exit_code == 0, restored.output
    assert _query(url, select(User.roles).where(User.username == "imarwick")) == [("engineer",)]
    again = runner.invoke(main, ["backup", str(target)])
    assert again.exit_code == 2 and "exists" in again.output


def test_restore_refuses_a_broken_backup(cli_env, tmp_path):
    runner, url = cli_env
    runner.invoke(main, ["demo", "load"])
    target = tmp_path / "backup.db"
    runner.invoke(main, ["backup", str(target)])
    import sqlite3

    conn = sqlite3.connect(target)
    conn.execute("DROP TRIGGER audit_events_no_update")
    conn.execute("UPDATE audit_events SET reason = 'rewritten' WHERE seq = 2")
    conn.commit()
    conn.close()
    result = runner.invoke(main, ["restore", str(target), "--yes"])
    assert result.exit_code == 2
    assert "chain broken at event #2" in result.output


def _add_users(runner, *usernames):
    for username in usernames:
        added = runner.invoke(main, ["users", "add", username, "--name", username.title(),
                                     "--roles", "engineer", "--password-stdin"],
                              input="a sufficiently long phrase\n")
        assert added.exit_code == 0, added.output


def test_audit_anchor_prints_the_keyed_head(cli_env, tmp_path):
    import json

    from app.store.models import ChainHead

    runner, url = cli_env
    _add_users(runner, "mkade")
    result = runner.invoke(main, ["audit", "anchor"])
    assert result.exit_code == 0, result.output
    line = json.loads(result.output)
    assert _query(url, select(ChainHead.seq, ChainHead.hash)) == [(line["seq"], line["hash"])]
    assert set(line) == {"v", "seq", "hash", "at", "key_id", "mac"}
    kept = tmp_path / "external.log"  # the printed line is what an external log keeps
    kept.write_text(result.output)
    checked = runner.invoke(main, ["audit", "verify", "--anchor", str(kept)])
    assert checked.exit_code == 0, checked.output
    assert "anchors hold: 1 anchored heads" in checked.output
    line["mac"] = "0" * 64
    kept.write_text(json.dumps(line) + "\n")
    forged = runner.invoke(main, ["audit", "verify", "--anchor", str(kept)])
    assert forged.exit_code == 1 and "invalid MAC" in forged.output


def test_audit_verify_anchor_finds_a_removed_tail(cli_env, tmp_path):
    import sqlite3

    runner, url = cli_env
    _add_users(runner, "abel", "ada", "erin", "otto")
    anchor_file = tmp_path / "instance" / "audit-anchor.log"
    assert runner.invoke(main, ["audit", "verify", "--anchor", str(anchor_file)]).exit_code == 0
    top = _query(url, select(func.max(AuditEvent.seq)))[0][0]
    # A database writer removes the last two users' events and moves the chain head back.
    conn = sqlite3.connect(tmp_path / "cli.db")
    triggers = conn.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger' "
                            "AND tbl_name IN ('audit_events', 'chain_head')").fetchall()
    for name, _sql in triggers:
        conn.execute(f'DROP TRIGGER "{name}"')
    keep = _query(url, select(AuditEvent.seq).where(AuditEvent.object_id == "3")
                  .order_by(AuditEvent.seq))[0][0] - 1  # events before the third user
    assert 0 < keep < top - 1
    conn.execute("DELETE FROM audit_events WHERE seq > ?", (keep,))
    conn.execute("UPDATE chain_head SET seq = ?, hash = (SELECT hash FROM audit_events "
                 "WHERE seq = ?) WHERE id = 1", (keep, keep))
    for _name, sql in triggers:
        conn.execute(sql)
    conn.commit()
    conn.close()
    assert runner.invoke(main, ["audit", "verify"]).exit_code == 0  # the chain alone holds
    result = runner.invoke(main, ["audit", "verify", "--anchor", str(anchor_file)])
    assert result.exit_code == 1
    assert f"anchored head #{top} is missing from the chain" in result.output
    both = runner.invoke(main, ["audit", "verify", "--anchor", str(anchor_file), "--package",
                                str(anchor_file)])
    assert both.exit_code == 2


HEAVY = ("pandas", "scipy", "statsmodels", "altair")


def test_help_and_audit_verify_start_without_the_analysis_libraries(cli_env):
    """`plumbline --help` and `plumbline audit verify` import no analysis or chart library
    (the start-up of the command was most of its time and memory)."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    runner, _url = cli_env
    added = runner.invoke(main, ["users", "add", "vera", "--name", "Vera Verify", "--roles",
                                 "auditor", "--password-stdin"], input="a long enough phrase\n")
    assert added.exit_code == 0, added.output
    root = Path(__file__).resolve().parents[1]
    code = (
        "import sys\n"
        "from click.testing import CliRunner\n"
        "from app.cli import main\n"
        "for args in (['--help'], ['audit', 'verify']):\n"
        "    result = CliRunner().invoke(main, args)\n"
        "    assert result.exit_code == 0, result.output\n"
        "    print(result.output)\n"
        f"print('heavy:', sorted({{m.split('.')[0] for m in sys.modules}} & {set(HEAVY)!r}))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=root, env={**os.environ, "PYTHONPATH": str(root)}, check=True)
    assert "chain intact: " in out.stdout and "agree with the trail" in out.stdout
    assert "heavy: []" in out.stdout, out.stdout


def test_check_runs_without_scipy_stats_statsmodels_or_openpyxl(tmp_path):
    """`plumbline check` on a CSV loads neither scipy.stats nor statsmodels nor openpyxl: the
    distribution points come from scipy.special (at 100,000 runs scipy.stats alone was a sixth
    of the command's time; `make bench` compares the command with a scripted equivalent)."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    rows = ["A,B,Y"] + [f"{a},{b},{10 + a + 2 * b + 0.1 * ((i * 7) % 5)}"
                        for i, (a, b) in enumerate([(-1, -1), (1, -1), (-1, 1), (1, 1)] * 3)]
    data = tmp_path / "runs.csv"
    data.write_text("\n".join(rows) + "\n")
    root = Path(__file__).resolve().parents[1]
    code = (
        "import sys\n"
        "from click.testing import CliRunner\n"
        "from app.cli import main\n"
        f"result = CliRunner().invoke(main, ['check', {str(data)!r}, '--response', 'Y'])\n"
        "assert result.exit_code == 0, result.output\n"
        "print(result.output)\n"
        "print('loaded:', sorted(m for m in ('scipy.stats', 'statsmodels', 'openpyxl')"
        " if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=root, env={**os.environ, "PYTHONPATH": str(root)}, check=True)
    assert "normality" in out.stdout, out.stdout
    assert "loaded: []" in out.stdout, out.stdout


def test_plan_writes_a_randomised_run_sheet(tmp_path):
    """`plumbline plan` builds the design without a server: a 2^(5-1) in 16 runs with its
    published generator (E = ABCD, Box, Hunter & Hunter ch. 6) and a seeded order."""
    import csv
    import json as json_module

    from click.testing import CliRunner

    from app.cli import main

    out, doc = tmp_path / "sheet.csv", tmp_path / "plan.json"
    args = ["plan", "--design", "fractional_factorial", "--runs", "16", "--centre-points", "0",
            "--seed", "5", "--response", "Yield"]
    for name in "ABCDE":
        args += ["--factor", f"{name}=0:10:mm"]
    result = CliRunner().invoke(main, [*args, "--out", str(out), "--json", str(doc)])
    assert result.exit_code == 0, result.output
    rows = list(csv.reader(out.read_text(encoding="utf-8").splitlines()))
    assert rows[0] == ["Run order", "Run label", *(f"{n} [mm]" for n in "ABCDE"), "Yield"]
    assert len(rows) == 17
    plan = json_module.loads(doc.read_text(encoding="utf-8"))["plan"]
    assert plan["resolution"] == 5 and plan["generators"] == ["E = A:B:C:D"]
    again = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "again.csv")])
    assert again.exit_code == 0, again.output
    assert (tmp_path / "again.csv").read_text(encoding="utf-8") == out.read_text(
        encoding="utf-8")
    bad = CliRunner().invoke(main, ["plan", "--design", "box_behnken", "--factor", "A=1:0",
                                    "--factor", "B=0:1", "--factor", "C=0:1"])
    assert bad.exit_code == 2 and "factors[0]" in bad.output
