"""Plans: designs built in a study before any run, and data versions uploaded against them.

``plans`` holds the request, the built design with its randomised run order and seed, its
evaluation and their SHA-256 (sealed with the integrity key like fit snapshots);
``plan_uploads`` links a data version to the plan it was run from, with the tolerance its
settings were compared with. Neither is ever changed: no UPDATE, no DELETE (nor TRUNCATE on
PostgreSQL). The refusing function ``signed_rows_refuse`` comes from 0005.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-03
"""
import sqlalchemy as sa
from alembic import op


revision = '0009'
down_revision = '0008'
branch_labels = None
depends_on = None

TABLES = {'plans': 'plans are immutable', 'plan_uploads': 'plan uploads are immutable'}


def _refuse(table: str, message: str) -> None:
    kinds = (('no_update', 'UPDATE'), ('no_delete', 'DELETE'))
    if op.get_bind().dialect.name == 'sqlite':
        for suffix, kind in kinds:
            op.execute(f"CREATE TRIGGER {table}_{suffix} BEFORE {kind} ON {table} "
                       f"BEGIN SELECT RAISE(ABORT, '{message}'); END")
        return
    for suffix, kind in kinds:
        op.execute(f"CREATE TRIGGER {table}_{suffix} BEFORE {kind} ON {table} FOR EACH ROW "
                   f"EXECUTE FUNCTION signed_rows_refuse('{message}')")
    op.execute(f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
               f"FOR EACH STATEMENT EXECUTE FUNCTION signed_rows_refuse('{message}')")


def upgrade() -> None:
    op.create_table(
        'plans',
        sa.Column('id', sa.Integer(), primary_key=True),
        sa.Column('study_id', sa.Integer(), sa.ForeignKey('studies.id'), nullable=False),
        sa.Column('design', sa.String(length=32), nullable=False),
        sa.Column('request_json', sa.Text(), nullable=False),
        sa.Column('plan_json', sa.Text(), nullable=False),
        sa.Column('evaluation_json', sa.Text(), nullable=False),
        sa.Column('sha256', sa.String(length=64), nullable=False),
        sa.Column('key_id', sa.String(length=16), nullable=True),
        sa.Column('seal', sa.String(length=64), nullable=True),
        sa.Column('created_by_id', sa.Integer(), sa.ForeignKey('users.id'), nullable=False),
        sa.Column('created_at', sa.DateTime(), nullable=False),
    )
    op.create_index('ix_plans_study_id', 'plans', ['study_id'])
    op.create_table(
        'plan_uploads',
        sa.Column('data_version_id', sa.Integer(), sa.ForeignKey('data_versions.id'),
                  primary_key=True),
        sa.Column('plan_id', sa.Integer(), sa.ForeignKey('plans.id'), nullable=False),
        sa.Column('tolerance_json', sa.Text(), nullable=False),
    )
    op.create_index('ix_plan_uploads_plan_id', 'plan_uploads', ['plan_id'])
    for table, message in TABLES.items():
        _refuse(table, message)


def downgrade() -> None:
    op.drop_table('plan_uploads')
    op.drop_table('plans')
