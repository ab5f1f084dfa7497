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


def test_0004_gives_existing_tokens_read_write_and_an_expiry(tmp_path):
    from datetime import UTC, datetime, timedelta

    url = f"sqlite:///{tmp_path / 'tokens.db'}"
    upgrade(url, "0003")
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.execute(text("INSERT INTO users (id, username, full_name, password_hash, roles, "
                          "active, must_change_password, created_at, password_changed_at) "
                          "VALUES (1, 'erin', 'Erin', 'x', 'engineer', 1, 0, "
                          "'2026-01-01 00:00:00.000000', '2026-01-01 00:00:00.000000')"))
        conn.execute(text("INSERT INTO api_tokens (id, user_id, name, token_sha256, prefix, "
                          "created_at) VALUES (1, 1, 'old', :sha, 'plb_old', "
                          "'2026-01-01 00:00:00.000000')"), {"sha": "0" * 64})
    engine.dispose()
    before = datetime.now(UTC).replace(tzinfo=None)
    upgrade(url)
    assert _diff_ignoring_types(url) == []
    engine = create_engine(url)
    with engine.begin() as conn:
        scope, expires = conn.execute(text(
            "SELECT scope, expires_at FROM api_tokens WHERE id = 1")).one()
        assert scope == "read-write"
        expires = datetime.fromisoformat(expires)
        assert before + timedelta(days=90) <= expires <= before + timedelta(days=90, hours=1)
        # New rows get their expiry from the service: the column has no default left.
        default = {c["name"]: c["default"] for c in inspect(conn).get_columns("api_tokens")}
        assert default["expires_at"] is None and "read-write" in default["scope"]
    engine.dispose()
    downgrade(url, "0003")
    engine = create_engine(url)
    columns = {c["name"] for c in inspect(engine).get_columns("api_tokens")}
    assert "scope" not in columns and "expires_at" not in columns
    engine.dispose()


SIGNED_ROW_TRIGGERS = {"signatures_no_update", "signatures_no_delete", "fits_snapshot_no_update",
                       "fits_no_delete", "setpoint_proposals_snapshot_no_update",
                       "setpoint_proposals_no_delete",
                       # 0009: plans and the links of data versions to them
                       "plans_no_update", "plans_no_delete", "plan_uploads_no_update",
                       "plan_uploads_no_delete"}


def _triggers(url: str) -> set[str]:
    engine = create_engine(url)
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            sql = "SELECT name FROM sqlite_master WHERE type = 'trigger'"
        else:
            sql = "SELECT tgname FROM pg_trigger WHERE NOT tgisinternal"
        names = {r[0] for r in conn.execute(text(sql))}
    engine.dispose()
    return names


def test_0005_guards_signed_rows_and_goes_down_and_up(backend, app):
    """Any later batch rebuild of these tables on SQLite must recreate the triggers."""
    url = app.config["DATABASE_URL"]  # migrated to head from the template
    extra = set() if backend == "sqlite" else {
        "signatures_no_truncate", "fits_no_truncate", "setpoint_proposals_no_truncate",
        "plans_no_truncate", "plan_uploads_no_truncate"}
    assert SIGNED_ROW_TRIGGERS | extra <= _triggers(url)
    downgrade(url, "0004")
    left = _triggers(url)
    assert not left & (SIGNED_ROW_TRIGGERS | extra)
    assert "audit_events_no_update" in left
    upgrade(url)
    assert SIGNED_ROW_TRIGGERS | extra <= _triggers(url)
    assert _diff_ignoring_types(url) == []
