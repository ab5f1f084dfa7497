"""Per-run tables of fits, stored column-wise beside the snapshot (``fit_runs``).

A fit's results document used to hold one JSON object per run; from this revision a new fit's
document holds a summary naming the SHA-256 of a compact column-wise block
(``app.analysis.runstore``), and the block lives here, one row per fit. Fits stored before keep
their runs in the document and no row here.

Like the snapshot it belongs to, a block is never changed: no UPDATE, no DELETE (nor TRUNCATE
on PostgreSQL). The refusing function ``signed_rows_refuse`` comes from 0005.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-02
"""
import sqlalchemy as sa
from alembic import op


revision = '0008'
down_revision = '0007'
branch_labels = None
depends_on = None

MESSAGE = 'fit run tables are immutable'
TRIGGERS = (('fit_runs_no_update', 'UPDATE'), ('fit_runs_no_delete', 'DELETE'))


def upgrade() -> None:
    op.create_table(
        'fit_runs',
        sa.Column('fit_id', sa.Integer(), sa.ForeignKey('fits.id'), primary_key=True),
        sa.Column('sha256', sa.String(length=64), nullable=False),
        sa.Column('data', sa.LargeBinary(), nullable=False),
    )
    if op.get_bind().dialect.name == 'sqlite':
        for name, kind in TRIGGERS:
            op.execute(f"CREATE TRIGGER {name} BEFORE {kind} ON fit_runs "
                       f"BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END")
    else:
        for name, kind in TRIGGERS:
            op.execute(f"CREATE TRIGGER {name} BEFORE {kind} ON fit_runs FOR EACH ROW "
                       f"EXECUTE FUNCTION signed_rows_refuse('{MESSAGE}')")
        op.execute("CREATE TRIGGER fit_runs_no_truncate BEFORE TRUNCATE ON fit_runs "
                   f"FOR EACH STATEMENT EXECUTE FUNCTION signed_rows_refuse('{MESSAGE}')")


def downgrade() -> None:
    op.drop_table('fit_runs')
