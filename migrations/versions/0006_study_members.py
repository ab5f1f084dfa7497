"""Study teams: the engineers besides the owner who may read and act on a study.

The owner (``studies.owner_id``) is a member without a row here. ``role`` is "engineer" for
now; the column is kept for roles a team may gain later. One row per (study, user).

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = '0006'
down_revision = '0005'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('study_members',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('role', sa.String(length=16), server_default='engineer', nullable=False),
    sa.Column('added_by_id', sa.Integer(), nullable=True),
    sa.Column('added_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['study_id'], ['studies.id'],
                            name=op.f('fk_study_members_study_id_studies')),
    sa.ForeignKeyConstraint(['user_id'], ['users.id'],
                            name=op.f('fk_study_members_user_id_users')),
    sa.ForeignKeyConstraint(['added_by_id'], ['users.id'],
                            name=op.f('fk_study_members_added_by_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_study_members')),
    sa.UniqueConstraint('study_id', 'user_id', name=op.f('uq_study_members_study_id'))
    )
    with op.batch_alter_table('study_members', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_study_members_study_id'), ['study_id'],
                              unique=False)
        batch_op.create_index(batch_op.f('ix_study_members_user_id'), ['user_id'],
                              unique=False)


def downgrade() -> None:
    with op.batch_alter_table('study_members', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_study_members_user_id'))
        batch_op.drop_index(batch_op.f('ix_study_members_study_id'))
    op.drop_table('study_members')
