"""Setpoint proposals and confirmation runs.

Release signatures use the existing nullable ``signatures.setpoint_id`` column (no foreign key,
as in 0001), so the signatures table is not touched here.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-08
"""
from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('setpoint_proposals',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('fit_ids_json', sa.Text(), nullable=False),
    sa.Column('goals_json', sa.Text(), nullable=False),
    sa.Column('bounds_json', sa.Text(), nullable=False),
    sa.Column('fixed_json', sa.Text(), nullable=False),
    sa.Column('result_json', sa.Text(), nullable=False),
    sa.Column('snapshot_sha256', sa.String(length=64), nullable=False),
    sa.Column('state', sa.String(length=16), nullable=False),
    sa.Column('row_version', sa.Integer(), nullable=False),
    sa.Column('created_by_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['created_by_id'], ['users.id'],
                            name=op.f('fk_setpoint_proposals_created_by_id_users')),
    sa.ForeignKeyConstraint(['study_id'], ['studies.id'],
                            name=op.f('fk_setpoint_proposals_study_id_studies')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_setpoint_proposals'))
    )
    with op.batch_alter_table('setpoint_proposals', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_setpoint_proposals_study_id'), ['study_id'],
                              unique=False)

    op.create_table('confirmation_runs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('setpoint_id', sa.Integer(), nullable=False),
    sa.Column('filename', sa.String(length=255), nullable=False),
    sa.Column('original_bytes', sa.LargeBinary(), nullable=False),
    sa.Column('original_sha256', sa.String(length=64), nullable=False),
    sa.Column('results_json', sa.Text(), nullable=False),
    sa.Column('created_by_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['created_by_id'], ['users.id'],
                            name=op.f('fk_confirmation_runs_created_by_id_users')),
    sa.ForeignKeyConstraint(['setpoint_id'], ['setpoint_proposals.id'],
                            name=op.f('fk_confirmation_runs_setpoint_id_setpoint_proposals')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_confirmation_runs'))
    )
    with op.batch_alter_table('confirmation_runs', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_confirmation_runs_setpoint_id'), ['setpoint_id'],
                              unique=False)


def downgrade() -> None:
    with op.batch_alter_table('confirmation_runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_confirmation_runs_setpoint_id'))

    op.drop_table('confirmation_runs')
    with op.batch_alter_table('setpoint_proposals', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_setpoint_proposals_study_id'))

    op.drop_table('setpoint_proposals')
