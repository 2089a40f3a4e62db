"""cluster state: model bindings, polled counters, cluster secrets, dashboard sessions, failed authentications

Revision ID: 0005
Revises: 0003
Create Date: 2026-12-03

What several workers and replicas must agree on lives in the database (issue 11): the
version each model id serves (model_bindings; moved by a reload), the registry generation
every process polls before a batch (cluster_counters), the session signing secret made once
(cluster_secrets), server-side dashboard sessions (web_sessions: sign-out and key revocation
end them at once) and failed authentications per client address (auth_failures).
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0005'
down_revision: str | None = '0003'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('model_bindings',
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('version', sa.String(length=64), nullable=False),
    sa.Column('switched_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('switched_by', sa.String(length=128), nullable=False),
    sa.PrimaryKeyConstraint('model_id', name=op.f('pk_model_bindings'))
    )
    counters = op.create_table('cluster_counters',
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('value', sa.BigInteger(), nullable=False),
    sa.PrimaryKeyConstraint('name', name=op.f('pk_cluster_counters'))
    )
    # The row every process polls exists from the start, so a switch only ever updates it.
    op.bulk_insert(counters, [{'name': 'registry_generation', 'value': 0}])
    op.create_table('cluster_secrets',
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('value', sa.Text(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('name', name=op.f('pk_cluster_secrets'))
    )
    op.create_table('web_sessions',
    sa.Column('sid_hash', sa.String(length=64), nullable=False),
    sa.Column('key_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('expires_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('ended_at', sa.DateTime(timezone=True), nullable=True),
    sa.ForeignKeyConstraint(['key_id'], ['api_keys.id'], name=op.f('fk_web_sessions_key_id_api_keys')),
    sa.PrimaryKeyConstraint('sid_hash', name=op.f('pk_web_sessions'))
    )
    op.create_index('ix_web_sessions_key_id', 'web_sessions', ['key_id'], unique=False)
    op.create_table('auth_failures',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('address', sa.String(length=64), nullable=False),
    sa.Column('at_ms', sa.BigInteger(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_auth_failures'))
    )
    op.create_index('ix_auth_failures_address_at', 'auth_failures', ['address', 'at_ms'], unique=False)
    op.create_index('ix_auth_failures_at', 'auth_failures', ['at_ms'], unique=False)


def downgrade() -> None:
    op.drop_index('ix_auth_failures_at', table_name='auth_failures')
    op.drop_index('ix_auth_failures_address_at', table_name='auth_failures')
    op.drop_table('auth_failures')
    op.drop_index('ix_web_sessions_key_id', table_name='web_sessions')
    op.drop_table('web_sessions')
    op.drop_table('cluster_secrets')
    op.drop_table('cluster_counters')
    op.drop_table('model_bindings')
