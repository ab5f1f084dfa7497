"""8 writers × 100 operations at once: no "database is locked" reaches a user, the chain holds.

Runs on SQLite (write transactions BEGIN IMMEDIATE and wait on the busy timeout) and on
PostgreSQL (appends serialize on the chain-head row lock)."""

from __future__ import annotations

import threading

from sqlalchemy import func, select

from app.store import audit
from app.store.models import AuditEvent, Study
from tests.conftest import Actions

WRITERS = 8
OPERATIONS = 100


def test_eight_writers_hundred_operations_each(app, users, db):
    barrier = threading.Barrier(WRITERS, timeout=120)
    errors: list[BaseException] = []
    statuses: list[int] = []
    bodies: list[str] = []
    lock = threading.Lock()

    def writer(index: int) -> None:
        try:
            write(index)
        except BaseException as exc:  # reported below; a dead writer must not hang the others
            errors.append(exc)
            barrier.abort()

    def write(index: int) -> None:
        actions = Actions(app.test_client())
        login = actions.login("erin")
        assert login.status_code == 302, (login.status_code, login.get_data(as_text=True)[:300])
        token = actions.csrf()
        barrier.wait()
        for op in range(OPERATIONS):
            response = actions.client.post("/studies/new", data={
                "title": f"writer {index} op {op}", "csrf_token": token})
            with lock:
                statuses.append(response.status_code)
                if response.status_code != 302:
                    bodies.append(response.get_data(as_text=True)[:300])

    threads = [threading.Thread(target=writer, args=(i,)) for i in range(WRITERS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()

    assert not errors, errors[:3]
    assert not any("locked" in b for b in bodies), bodies[:3]
    assert statuses.count(302) == WRITERS * OPERATIONS, set(statuses)
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(Study)) == WRITERS * OPERATIONS
        creates = s.scalar(select(func.count()).select_from(AuditEvent)
                           .where(AuditEvent.action == "study.create"))
        assert creates == WRITERS * OPERATIONS
        report = audit.verify(s)
    assert report.ok, report.describe()
