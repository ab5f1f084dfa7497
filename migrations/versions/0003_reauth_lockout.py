"""One counter of consecutive wrong passwords at signing and password change, and its lock.

Both columns live on ``users``: the counter belongs to the account, and a sign-off reads the
signer's row anyway. The counter gets a server default so existing accounts start at 0.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""
from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('users', schema=None) as batch_op:
        batch_op.add_column(sa.Column('reauth_failures', sa.Integer(), nullable=False,
                                      server_default='0'))
        batch_op.add_column(sa.Column('reauth_locked_until', sa.DateTime(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('users', schema=None) as batch_op:
        batch_op.drop_column('reauth_locked_until')
        batch_op.drop_column('reauth_failures')
