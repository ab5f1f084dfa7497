"""Signatures, fit snapshots and setpoint proposal snapshots: refused changes in the database.

Like the audit events (0001), these rows are what a signature vouches for, so the database
itself refuses to change them:

* ``signatures``: no UPDATE, no DELETE (and no TRUNCATE on PostgreSQL).
* ``fits``: no DELETE (nor TRUNCATE), and no UPDATE of the snapshot columns, the ones
  ``app.workflow.fits.snapshot_sha256`` hashes (data version link, spec, results, thresholds,
  software version), the stored hash itself, and ``response`` (which a setpoint proposal's hash
  covers). ``state``, ``row_version`` and the submission fields stay updatable: the sign-off
  workflow moves them.
* ``setpoint_proposals``: likewise, no DELETE, and no UPDATE of what
  ``app.workflow.setpoints.snapshot_sha256`` covers (study, fits, goals, bounds, fixed
  settings, result) nor of the stored hash; ``state`` and ``row_version`` stay updatable.

An UPDATE that sets a protected column to the value it already has is let through.

SQLite drops a table's triggers with the table, and Alembic's batch mode rebuilds tables on
SQLite: a later migration that batch-alters one of these tables must create its triggers again
(``tests/store/test_migrations.py`` checks that they exist at head).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""
from alembic import op


revision = '0005'
down_revision = '0004'
branch_labels = None
depends_on = None

SIGNATURES_MESSAGE = 'signatures are append-only'
FIT_COLUMNS = ('data_version_id', 'response', 'spec_json', 'results_json', 'thresholds_json',
               'software_version', 'snapshot_sha256')
FIT_MESSAGE = 'fit snapshots are immutable'
SETPOINT_COLUMNS = ('study_id', 'fit_ids_json', 'goals_json', 'bounds_json', 'fixed_json',
                    'result_json', 'snapshot_sha256')
SETPOINT_MESSAGE = 'setpoint proposal snapshots are immutable'

# (table, trigger name, kind, columns, message); kind is "update", "delete" or "truncate".
TRIGGERS = (
    ('signatures', 'signatures_no_update', 'update', None, SIGNATURES_MESSAGE),
    ('signatures', 'signatures_no_delete', 'delete', None, SIGNATURES_MESSAGE),
    ('signatures', 'signatures_no_truncate', 'truncate', None, SIGNATURES_MESSAGE),
    ('fits', 'fits_snapshot_no_update', 'update', FIT_COLUMNS, FIT_MESSAGE),
    ('fits', 'fits_no_delete', 'delete', None, FIT_MESSAGE),
    ('fits', 'fits_no_truncate', 'truncate', None, FIT_MESSAGE),
    ('setpoint_proposals', 'setpoint_proposals_snapshot_no_update', 'update', SETPOINT_COLUMNS,
     SETPOINT_MESSAGE),
    ('setpoint_proposals', 'setpoint_proposals_no_delete', 'delete', None, SETPOINT_MESSAGE),
    ('setpoint_proposals', 'setpoint_proposals_no_truncate', 'truncate', None,
     SETPOINT_MESSAGE),
)

POSTGRES_FUNCTION = (
    """CREATE FUNCTION signed_rows_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
       BEGIN RAISE EXCEPTION '%', TG_ARGV[0]; END $$""")


def _changed(columns: tuple[str, ...], differ: str) -> str:
    return ' OR '.join(f'OLD.{c} {differ} NEW.{c}' for c in columns)


def _sqlite(table: str, name: str, kind: str, columns, message: str) -> str | None:
    if kind == 'truncate':
        return None  # SQLite has no TRUNCATE; its DELETE without WHERE fires the trigger.
    when = ''
    if columns:
        when = f" OF {', '.join(columns)}"
    condition = f' WHEN {_changed(columns, "IS NOT")}' if columns else ''
    return (f"CREATE TRIGGER {name} BEFORE {kind.upper()}{when} ON {table}{condition} "
            f"BEGIN SELECT RAISE(ABORT, '{message}'); END")


def _postgres(table: str, name: str, kind: str, columns, message: str) -> str:
    if kind == 'truncate':
        return (f"CREATE TRIGGER {name} BEFORE TRUNCATE ON {table} FOR EACH STATEMENT "
                f"EXECUTE FUNCTION signed_rows_refuse('{message}')")
    of = f" OF {', '.join(columns)}" if columns else ''
    condition = f' WHEN ({_changed(columns, "IS DISTINCT FROM")})' if columns else ''
    return (f"CREATE TRIGGER {name} BEFORE {kind.upper()}{of} ON {table} FOR EACH ROW"
            f"{condition} EXECUTE FUNCTION signed_rows_refuse('{message}')")


def upgrade() -> None:
    if op.get_bind().dialect.name == 'sqlite':
        for trigger in TRIGGERS:
            statement = _sqlite(*trigger)
            if statement:
                op.execute(statement)
    else:
        op.execute(POSTGRES_FUNCTION)
        for trigger in TRIGGERS:
            op.execute(_postgres(*trigger))


def downgrade() -> None:
    sqlite = op.get_bind().dialect.name == 'sqlite'
    for table, name, kind, _columns, _message in TRIGGERS:
        if sqlite:
            if kind != 'truncate':
                op.execute(f'DROP TRIGGER IF EXISTS {name}')
        else:
            op.execute(f'DROP TRIGGER IF EXISTS {name} ON {table}')
    if not sqlite:
        op.execute('DROP FUNCTION IF EXISTS signed_rows_refuse()')
