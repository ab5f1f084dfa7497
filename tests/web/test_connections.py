"""A request holds at most one pooled connection per engine at a time.

Two nested sessions in one request (for example a template helper opening its own) let N
concurrent requests hold N connections while each waits for another: with N at the pool's size
every request stalls until the pool times out. This was seen under the load benchmark."""

from __future__ import annotations

import pytest
from sqlalchemy import event

from tests.workflow.helpers import approved_fit


@pytest.fixture
def peak(db):
    state = {"out": {}, "peak": {}}

    def watch(engine, name):
        def checkout(*_):
            state["out"][name] = state["out"].get(name, 0) + 1
            state["peak"][name] = max(state["peak"].get(name, 0), state["out"][name])

        def checkin(*_):
            state["out"][name] -= 1

        event.listen(engine, "checkout", checkout)
        event.listen(engine, "checkin", checkin)

    watch(db.read_engine, "read")
    if db.write_engine is not db.read_engine:
        watch(db.write_engine, "write")
    return state


def test_pages_use_one_connection_per_engine(db, client, actions, users, peak):
    study_id, version_id, fit_id = approved_fit(db)
    actions.login("otto")
    pages = [f"/studies/{study_id}", f"/data/{version_id}", f"/fits/{fit_id}",
             f"/fits/{fit_id}/review", f"/fits/{fit_id}/record.json", "/studies/",
             f"/history/studies/{study_id}", "/history/integrity"]
    for url in pages:
        peak["peak"].clear()
        response = client.get(url)
        assert response.status_code == 200, url
        assert all(n <= 1 for n in peak["peak"].values()), (url, peak["peak"])
