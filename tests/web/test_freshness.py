"""Read requests reuse the signed-in user and the team check while the audit chain has not
moved (app.web.freshness); every audited change ends that at once, and the idle and age limits
still hold on every request."""

from __future__ import annotations

from datetime import timedelta

from sqlalchemy import event

from app.store.base import utcnow
from app.store.db import database
from app.workflow import accounts, teams
from tests.workflow import helpers as h


def _statements(app):
    seen = []
    engine = database(app).read_engine

    def count(_conn, _cursor, statement, *_args):
        if not statement.lstrip().upper().startswith("BEGIN"):
            seen.append(statement)

    event.listen(engine, "before_cursor_execute", count)
    return seen, lambda: event.remove(engine, "before_cursor_execute", count)


def test_a_remembered_user_costs_no_query_and_sees_the_same_page(app, db, users, actions,
                                                                   client, backend):
    study_id = h.make_study(db)
    actions.login("erin")
    first = client.get(f"/studies/{study_id}")
    seen, stop = _statements(app)
    try:
        again = client.get(f"/studies/{study_id}")
    finally:
        stop()
    assert again.status_code == 200 and again.data == first.data
    # One statement: on SQLite whether any connection has committed since (the chain head is
    # then reused too), elsewhere the chain head itself. User, team check and page come from
    # what the earlier request left.
    assert len(seen) == 1
    assert ("data_version" if backend == "sqlite" else "chain_head") in seen[0]


def test_deactivation_ends_a_remembered_session_at_once(db, users, actions, client):
    study_id = h.make_study(db)
    actions.login("erin")
    assert client.get(f"/studies/{study_id}").status_code == 200
    with db.transaction() as s:
        accounts.set_active(s, h.user(s, "root"), "erin", False)
    assert client.get(f"/studies/{study_id}").status_code == 302  # to the sign-in page


def test_leaving_a_team_ends_a_remembered_read_at_once(db, users, actions, client):
    h.add_engineers(db, ("mia", "Mia Member"))
    study_id = h.make_study(db)
    h.join(db, study_id, "mia")
    actions.login("mia")
    assert client.get(f"/studies/{study_id}").status_code == 200
    with db.transaction() as s:
        study = s.get(teams.Study, study_id)
        teams.remove_member(s, h.user(s, "erin"), study, "mia")
    assert client.get(f"/studies/{study_id}").status_code == 404


def test_the_idle_limit_holds_for_a_remembered_user(app, db, users, actions, client,
                                                    monkeypatch):
    study_id = h.make_study(db)
    actions.login("erin")
    assert client.get(f"/studies/{study_id}").status_code == 200
    idle = timedelta(minutes=int(app.config["SESSION_IDLE_MINUTES"]))
    later = utcnow() + idle + timedelta(minutes=1)
    monkeypatch.setattr("app.web.access.utcnow", lambda: later)
    assert client.get(f"/studies/{study_id}").status_code == 302
