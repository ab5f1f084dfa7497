"""Upgrade → check → downgrade on an empty database.

Runs on a SQLite file and, when configured, on PostgreSQL.
"""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import create_engine, inspect, text

from app.store.base import Base
from app.store.migrate import downgrade, upgrade


def _diff_ignoring_types(url: str):
    engine = create_engine(url)
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": False})
        diff = compare_metadata(ctx, Base.metadata)
    engine.dispose()
    return diff


def test_upgrade_check_downgrade_sqlite(tmp_path):
    url = f"sqlite:///{tmp_path / 'empty.db'}"
    upgrade(url)
    assert _diff_ignoring_types(url) == [], "models and migrations disagree"
    engine = create_engine(url)
    with engine.connect() as conn:
        triggers = {r[0] for r in conn.execute(text(
            "SELECT name FROM sqlite_master WHERE type='trigger'"))}
        assert {"audit_events_no_update", "audit_events_no_delete"} <= triggers
        assert conn.execute(text("SELECT seq, hash FROM chain_head")).one() == (0, "0" * 64)
    engine.dispose()
    downgrade(url)
    engine = create_engine(url)
    assert set(inspect(engine).get_table_names()) == {"alembic_version"}
    engine.dispose()


def test_upgrade_check_downgrade_postgres(backend, app):
    if backend != "postgresql":
        import pytest

        pytest.skip("PostgreSQL run only (PLUMBLINE_TEST_DATABASE_URL)")
    url = app.config["DATABASE_URL"]
    # The per-test database was created from a migrated template: check, then go down and up.
    assert _diff_ignoring_types(url) == []
    downgrade(url)
    engine = create_engine(url)
    assert set(inspect(engine).get_table_names()) == {"alembic_version"}
    engine.dispose()
    upgrade(url)
    assert _diff_ignoring_types(url) == []
