"""Seals under the integrity key on audit events, fit and setpoint snapshots, signatures and
confirmation runs; the signed rows' triggers cover the seals too.

Every such row gains ``key_id`` (the integrity key's id) and ``seal`` (HMAC-SHA-256 of the
row's SHA-256 under that key; ``app.store.keys``). Rows written before this migration keep
both empty: for audit events the unsealed ones are the start of the chain, which the first
sealed event's hash covers.

The update triggers of ``fits`` and ``setpoint_proposals`` (0005) are created again with the
seal columns among the protected ones, and ``confirmation_runs`` gets the same refusals as the
other signed rows: no UPDATE, no DELETE (nor TRUNCATE on PostgreSQL). Columns are added with a
plain ALTER TABLE (no table rebuild), so the triggers of 0001 and 0005 stay in place on SQLite.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02
"""
import sqlalchemy as sa
from alembic import op


revision = '0007'
down_revision = '0006'
branch_labels = None
depends_on = None

TABLES = ('audit_events', 'fits', 'signatures', 'setpoint_proposals', 'confirmation_runs')
FIT_COLUMNS = ('data_version_id', 'response', 'spec_json', 'results_json', 'thresholds_json',
               'software_version', 'snapshot_sha256')
SETPOINT_COLUMNS = ('study_id', 'fit_ids_json', 'goals_json', 'bounds_json', 'fixed_json',
                    'result_json', 'snapshot_sha256')
SEAL_COLUMNS = ('key_id', 'seal')
FIT_MESSAGE = 'fit snapshots are immutable'
SETPOINT_MESSAGE = 'setpoint proposal snapshots are immutable'
CONFIRMATION_MESSAGE = 'confirmation runs are append-only'
# (table, trigger name, kind, columns, message) as in 0005.
UPDATE_TRIGGERS = (
    ('fits', 'fits_snapshot_no_update', 'update', FIT_COLUMNS, FIT_MESSAGE),
    ('setpoint_proposals', 'setpoint_proposals_snapshot_no_update', 'update', SETPOINT_COLUMNS,
     SETPOINT_MESSAGE),
)
NEW_TRIGGERS = (
    ('confirmation_runs', 'confirmation_runs_no_update', 'update', None, CONFIRMATION_MESSAGE),
    ('confirmation_runs', 'confirmation_runs_no_delete', 'delete', None, CONFIRMATION_MESSAGE),
    ('confirmation_runs', 'confirmation_runs_no_truncate', 'truncate', None,
     CONFIRMATION_MESSAGE),
)


def _changed(columns, differ: str) -> str:
    return ' OR '.join(f'OLD.{c} {differ} NEW.{c}' for c in columns)


def _sqlite(table, name, kind, columns, message):
    if kind == 'truncate':
        return None  # SQLite has no TRUNCATE; its DELETE without WHERE fires the trigger.
    of = f" OF {', '.join(columns)}" if columns else ''
    condition = f' WHEN {_changed(columns, "IS NOT")}' if columns else ''
    return (f"CREATE TRIGGER {name} BEFORE {kind.upper()}{of} ON {table}{condition} "
            f"BEGIN SELECT RAISE(ABORT, '{message}'); END")


def _postgres(table, name, kind, columns, message):
    if kind == 'truncate':
        return (f"CREATE TRIGGER {name} BEFORE TRUNCATE ON {table} FOR EACH STATEMENT "
                f"EXECUTE FUNCTION signed_rows_refuse('{message}')")
    of = f" OF {', '.join(columns)}" if columns else ''
    condition = f' WHEN ({_changed(columns, "IS DISTINCT FROM")})' if columns else ''
    return (f"CREATE TRIGGER {name} BEFORE {kind.upper()}{of} ON {table} FOR EACH ROW"
            f"{condition} EXECUTE FUNCTION signed_rows_refuse('{message}')")


def _create(triggers) -> None:
    sqlite = op.get_bind().dialect.name == 'sqlite'
    for trigger in triggers:
        statement = _sqlite(*trigger) if sqlite else _postgres(*trigger)
        if statement:
            op.execute(statement)


def _drop(triggers) -> None:
    sqlite = op.get_bind().dialect.name == 'sqlite'
    for table, name, kind, _columns, _message in triggers:
        if sqlite:
            if kind != 'truncate':
                op.execute(f'DROP TRIGGER IF EXISTS {name}')
        else:
            op.execute(f'DROP TRIGGER IF EXISTS {name} ON {table}')


def upgrade() -> None:
    for table in TABLES:
        op.add_column(table, sa.Column('key_id', sa.String(length=16), nullable=True))
        op.add_column(table, sa.Column('seal', sa.String(length=64), nullable=True))
    _drop(UPDATE_TRIGGERS)
    _create((table, name, kind, columns + SEAL_COLUMNS, message)
            for table, name, kind, columns, message in UPDATE_TRIGGERS)
    _create(NEW_TRIGGERS)


def downgrade() -> None:
    _drop(NEW_TRIGGERS)
    _drop(UPDATE_TRIGGERS)
    _create(UPDATE_TRIGGERS)
    # A plain ALTER TABLE … DROP COLUMN (SQLite 3.35 and later): a batch rebuild would drop
    # the tables' triggers on SQLite.
    for table in TABLES:
        op.drop_column(table, 'seal')
        op.drop_column(table, 'key_id')
