"""API tokens get a scope ("read" or "read-write") and an expiry.

Existing tokens keep working as before: they get the scope "read-write" and expire 90 days
after this upgrade (both through server defaults, so the columns can be NOT NULL at once). The
expiry's server default is a fixed moment, so it is dropped again afterwards: every new token
gets its expiry from the service (``accounts.create_token``).

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""
from datetime import UTC, datetime, timedelta

from alembic import op
import sqlalchemy as sa


revision = '0004'
down_revision = '0003'
branch_labels = None
depends_on = None

EXISTING_TOKEN_DAYS = 90


def upgrade() -> None:
    expires = (datetime.now(UTC) + timedelta(days=EXISTING_TOKEN_DAYS)).replace(tzinfo=None)
    # Naive UTC, as app.store.base.UTCDateTime stores it.
    literal = expires.strftime('%Y-%m-%d %H:%M:%S.%f')
    with op.batch_alter_table('api_tokens', schema=None) as batch_op:
        batch_op.add_column(sa.Column('scope', sa.String(length=16), nullable=False,
                                      server_default='read-write'))
        batch_op.add_column(sa.Column('expires_at', sa.DateTime(), nullable=False,
                                      server_default=literal))
    with op.batch_alter_table('api_tokens', schema=None) as batch_op:
        batch_op.alter_column('expires_at', existing_type=sa.DateTime(), existing_nullable=False,
                              server_default=None)


def downgrade() -> None:
    with op.batch_alter_table('api_tokens', schema=None) as batch_op:
        batch_op.drop_column('expires_at')
        batch_op.drop_column('scope')
