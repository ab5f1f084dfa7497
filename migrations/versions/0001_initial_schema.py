"""Initial schema: accounts, studies, data versions, fits, signatures, audit chain.

Timestamps are stored as naive UTC (app.store.base.UTCDateTime adds the zone on read).

Revision ID: 0001
Revises: (none)
Create Date: 2026-12-01
"""
from alembic import op
import sqlalchemy as sa


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


GENESIS_HASH = "0" * 64

SQLITE_TRIGGERS = (
    """CREATE TRIGGER audit_events_no_update BEFORE UPDATE ON audit_events
       BEGIN SELECT RAISE(ABORT, 'audit events are append-only'); END""",
    """CREATE TRIGGER audit_events_no_delete BEFORE DELETE ON audit_events
       BEGIN SELECT RAISE(ABORT, 'audit events are append-only'); END""",
)

POSTGRES_TRIGGERS = (
    """CREATE FUNCTION audit_events_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
       BEGIN RAISE EXCEPTION 'audit events are append-only'; END $$""",
    """CREATE TRIGGER audit_events_no_update BEFORE UPDATE OR DELETE ON audit_events
       FOR EACH ROW EXECUTE FUNCTION audit_events_refuse()""",
    """CREATE TRIGGER audit_events_no_truncate BEFORE TRUNCATE ON audit_events
       FOR EACH STATEMENT EXECUTE FUNCTION audit_events_refuse()""",
)


def _create_append_only_triggers() -> None:
    dialect = op.get_bind().dialect.name
    for statement in SQLITE_TRIGGERS if dialect == "sqlite" else POSTGRES_TRIGGERS:
        op.execute(statement)


def _drop_append_only_triggers() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("DROP TRIGGER IF EXISTS audit_events_no_update")
        op.execute("DROP TRIGGER IF EXISTS audit_events_no_delete")
    else:
        op.execute("DROP TRIGGER IF EXISTS audit_events_no_update ON audit_events")
        op.execute("DROP TRIGGER IF EXISTS audit_events_no_truncate ON audit_events")
        op.execute("DROP FUNCTION IF EXISTS audit_events_refuse()")


def upgrade() -> None:
    op.create_table('audit_events',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('at', sa.DateTime(), nullable=False),
    sa.Column('actor_id', sa.Integer(), nullable=True),
    sa.Column('actor_name', sa.String(length=200), nullable=False),
    sa.Column('action', sa.String(length=64), nullable=False),
    sa.Column('object_type', sa.String(length=32), nullable=False),
    sa.Column('object_id', sa.String(length=64), nullable=True),
    sa.Column('study_id', sa.Integer(), nullable=True),
    sa.Column('old_json', sa.Text(), nullable=True),
    sa.Column('new_json', sa.Text(), nullable=True),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('prev_hash', sa.String(length=64), nullable=False),
    sa.Column('hash', sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_events')),
    sa.UniqueConstraint('hash', name=op.f('uq_audit_events_hash')),
    sa.UniqueConstraint('seq', name=op.f('uq_audit_events_seq'))
    )
    with op.batch_alter_table('audit_events', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_audit_events_action'), ['action'], unique=False)
        batch_op.create_index(batch_op.f('ix_audit_events_study_id'), ['study_id'], unique=False)

    op.create_table('chain_head',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('hash', sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_chain_head'))
    )
    op.create_table('login_failures',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('username', sa.String(length=64), nullable=False),
    sa.Column('remote_addr', sa.String(length=64), nullable=True),
    sa.Column('at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_login_failures'))
    )
    with op.batch_alter_table('login_failures', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_login_failures_at'), ['at'], unique=False)
        batch_op.create_index(batch_op.f('ix_login_failures_remote_addr'), ['remote_addr'],
                              unique=False)
        batch_op.create_index(batch_op.f('ix_login_failures_username'), ['username'], unique=False)

    op.create_table('users',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('username', sa.String(length=64), nullable=False),
    sa.Column('full_name', sa.String(length=200), nullable=False),
    sa.Column('password_hash', sa.String(length=200), nullable=False),
    sa.Column('roles', sa.String(length=200), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('must_change_password', sa.Boolean(), nullable=False, server_default=sa.false()),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('password_changed_at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_users')),
    sa.UniqueConstraint('username', name=op.f('uq_users_username'))
    )
    op.create_table('api_tokens',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('token_sha256', sa.String(length=64), nullable=False),
    sa.Column('prefix', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('revoked_at', sa.DateTime(), nullable=True),
    sa.Column('last_used_at', sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(['user_id'], ['users.id'], name=op.f('fk_api_tokens_user_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_tokens')),
    sa.UniqueConstraint('token_sha256', name=op.f('uq_api_tokens_token_sha256'))
    )
    with op.batch_alter_table('api_tokens', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_api_tokens_user_id'), ['user_id'], unique=False)

    op.create_table('studies',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('title', sa.String(length=200), nullable=False),
    sa.Column('purpose', sa.Text(), nullable=False),
    sa.Column('process', sa.Text(), nullable=False),
    sa.Column('owner_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('review_below', sa.Float(), nullable=False),
    sa.Column('fail_below', sa.Float(), nullable=False),
    sa.ForeignKeyConstraint(['owner_id'], ['users.id'], name=op.f('fk_studies_owner_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_studies'))
    )
    op.create_table('user_sessions',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('token_sha256', sa.String(length=64), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('last_seen_at', sa.DateTime(), nullable=False),
    sa.Column('revoked_at', sa.DateTime(), nullable=True),
    sa.Column('remote_addr', sa.String(length=64), nullable=True),
    sa.ForeignKeyConstraint(['user_id'], ['users.id'], name=op.f('fk_user_sessions_user_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_user_sessions')),
    sa.UniqueConstraint('token_sha256', name=op.f('uq_user_sessions_token_sha256'))
    )
    with op.batch_alter_table('user_sessions', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_user_sessions_user_id'), ['user_id'], unique=False)

    op.create_table('data_versions',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('version', sa.Integer(), nullable=False),
    sa.Column('filename', sa.String(length=255), nullable=False),
    sa.Column('file_kind', sa.String(length=8), nullable=False),
    sa.Column('sheet', sa.String(length=255), nullable=True),
    sa.Column('original_bytes', sa.LargeBinary(), nullable=False),
    sa.Column('original_sha256', sa.String(length=64), nullable=False),
    sa.Column('canonical_csv', sa.LargeBinary(), nullable=False),
    sa.Column('canonical_sha256', sa.String(length=64), nullable=False),
    sa.Column('roles_json', sa.Text(), nullable=False),
    sa.Column('read_info_json', sa.Text(), nullable=False),
    sa.Column('n_rows', sa.Integer(), nullable=False),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('created_by_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['created_by_id'], ['users.id'],
                            name=op.f('fk_data_versions_created_by_id_users')),
    sa.ForeignKeyConstraint(['study_id'], ['studies.id'],
                            name=op.f('fk_data_versions_study_id_studies')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_data_versions')),
    sa.UniqueConstraint('study_id', 'version', name=op.f('uq_data_versions_study_id'))
    )
    with op.batch_alter_table('data_versions', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_data_versions_study_id'), ['study_id'], unique=False)

    op.create_table('fits',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('data_version_id', sa.Integer(), nullable=False),
    sa.Column('response', sa.String(length=200), nullable=False),
    sa.Column('spec_json', sa.Text(), nullable=False),
    sa.Column('results_json', sa.Text(), nullable=False),
    sa.Column('thresholds_json', sa.Text(), nullable=False),
    sa.Column('software_version', sa.String(length=64), nullable=False),
    sa.Column('snapshot_sha256', sa.String(length=64), nullable=False),
    sa.Column('state', sa.String(length=16), nullable=False),
    sa.Column('row_version', sa.Integer(), nullable=False),
    sa.Column('created_by_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('submitted_by_id', sa.Integer(), nullable=True),
    sa.Column('submitted_at', sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(['created_by_id'], ['users.id'],
                            name=op.f('fk_fits_created_by_id_users')),
    sa.ForeignKeyConstraint(['data_version_id'], ['data_versions.id'],
                            name=op.f('fk_fits_data_version_id_data_versions')),
    sa.ForeignKeyConstraint(['study_id'], ['studies.id'], name=op.f('fk_fits_study_id_studies')),
    sa.ForeignKeyConstraint(['submitted_by_id'], ['users.id'],
                            name=op.f('fk_fits_submitted_by_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_fits'))
    )
    with op.batch_alter_table('fits', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_fits_data_version_id'), ['data_version_id'],
                              unique=False)
        batch_op.create_index(batch_op.f('ix_fits_study_id'), ['study_id'], unique=False)

    op.create_table('signatures',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('fit_id', sa.Integer(), nullable=True),
    sa.Column('setpoint_id', sa.Integer(), nullable=True),
    sa.Column('signer_id', sa.Integer(), nullable=False),
    sa.Column('printed_name', sa.String(length=200), nullable=False),
    sa.Column('signed_at', sa.DateTime(), nullable=False),
    sa.Column('meaning', sa.String(length=100), nullable=False),
    sa.Column('comment', sa.Text(), nullable=False),
    sa.Column('snapshot_sha256', sa.String(length=64), nullable=False),
    sa.Column('manifest_sha256', sa.String(length=64), nullable=False),
    sa.ForeignKeyConstraint(['fit_id'], ['fits.id'], name=op.f('fk_signatures_fit_id_fits')),
    sa.ForeignKeyConstraint(['signer_id'], ['users.id'],
                            name=op.f('fk_signatures_signer_id_users')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_signatures'))
    )
    with op.batch_alter_table('signatures', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_signatures_fit_id'), ['fit_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_signatures_setpoint_id'), ['setpoint_id'],
                              unique=False)


    chain_head = sa.table("chain_head", sa.column("id"), sa.column("seq"), sa.column("hash"))
    op.bulk_insert(chain_head, [{"id": 1, "seq": 0, "hash": GENESIS_HASH}])
    _create_append_only_triggers()

def downgrade() -> None:
    _drop_append_only_triggers()
    with op.batch_alter_table('signatures', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_signatures_setpoint_id'))
        batch_op.drop_index(batch_op.f('ix_signatures_fit_id'))

    op.drop_table('signatures')
    with op.batch_alter_table('fits', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_fits_study_id'))
        batch_op.drop_index(batch_op.f('ix_fits_data_version_id'))

    op.drop_table('fits')
    with op.batch_alter_table('data_versions', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_data_versions_study_id'))

    op.drop_table('data_versions')
    with op.batch_alter_table('user_sessions', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_user_sessions_user_id'))

    op.drop_table('user_sessions')
    op.drop_table('studies')
    with op.batch_alter_table('api_tokens', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_api_tokens_user_id'))

    op.drop_table('api_tokens')
    op.drop_table('users')
    with op.batch_alter_table('login_failures', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_login_failures_username'))
        batch_op.drop_index(batch_op.f('ix_login_failures_remote_addr'))
        batch_op.drop_index(batch_op.f('ix_login_failures_at'))

    op.drop_table('login_failures')
    op.drop_table('chain_head')
    with op.batch_alter_table('audit_events', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_audit_events_study_id'))
        batch_op.drop_index(batch_op.f('ix_audit_events_action'))

    op.drop_table('audit_events')
