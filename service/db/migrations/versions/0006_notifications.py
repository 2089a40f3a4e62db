"""notifications: routing rules and the outbox alert transitions write (issue 14)

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-03

`notify_routes` say who hears about which alerts (webhook or e-mail, by asset and
severity); `notify_outbox` holds one row per message, written in the same transaction as
the alert transition and delivered by the background sender under a lease
(service/db/outbox.py, service/notifier.py).
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0006'
down_revision: str | None = '0005'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('notify_routes',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('channel', sa.String(length=16), nullable=False),
    sa.Column('target', sa.Text(), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=True),
    sa.Column('min_severity', sa.String(length=16), nullable=False),
    sa.Column('events', sa.JSON(), nullable=False),
    sa.Column('secret', sa.String(length=128), nullable=True),
    sa.Column('enabled', sa.Integer(), nullable=False),
    sa.Column('created_by', sa.String(length=128), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_notify_routes')),
    sa.UniqueConstraint('name', name=op.f('uq_notify_routes_name'))
    )
    op.create_table('notify_outbox',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('idempotency_key', sa.String(length=128), nullable=False),
    sa.Column('route_id', sa.Integer(), nullable=False),
    sa.Column('alert_id', sa.Integer(), nullable=True),
    sa.Column('kind', sa.String(length=16), nullable=False),
    sa.Column('payload', sa.JSON(), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('next_attempt_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('lease_until', sa.DateTime(timezone=True), nullable=True),
    sa.Column('lease_owner', sa.String(length=64), nullable=True),
    sa.Column('last_error', sa.Text(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('sent_at', sa.DateTime(timezone=True), nullable=True),
    sa.ForeignKeyConstraint(['alert_id'], ['alerts.id'], name=op.f('fk_notify_outbox_alert_id_alerts')),
    sa.ForeignKeyConstraint(['route_id'], ['notify_routes.id'], name=op.f('fk_notify_outbox_route_id_notify_routes')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_notify_outbox')),
    sa.UniqueConstraint('idempotency_key', name=op.f('uq_notify_outbox_idempotency_key'))
    )
    op.create_index('ix_notify_outbox_status_due', 'notify_outbox', ['status', 'next_attempt_at'], unique=False)
    op.create_index('ix_notify_outbox_alert', 'notify_outbox', ['alert_id'], unique=False)


def downgrade() -> None:
    op.drop_index('ix_notify_outbox_alert', table_name='notify_outbox')
    op.drop_index('ix_notify_outbox_status_due', table_name='notify_outbox')
    op.drop_table('notify_outbox')
    op.drop_table('notify_routes')
