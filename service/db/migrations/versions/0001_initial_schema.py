"""initial schema

Revision ID: 0001
Revises: (none)
Create Date: 2026-12-01

Every table of service/db/models.py as first released.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0001'
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('api_keys',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('role', sa.String(length=16), nullable=False),
    sa.Column('assets', sa.JSON(), nullable=True),
    sa.Column('key_hash', sa.String(length=64), nullable=False),
    sa.Column('prefix', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('revoked_at', sa.DateTime(timezone=True), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_keys')),
    sa.UniqueConstraint('key_hash', name=op.f('uq_api_keys_key_hash'))
    )
    op.create_table('assets',
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('last_reading_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('last_window_end_ms', sa.BigInteger(), nullable=True),
    sa.Column('last_score', sa.Float(), nullable=True),
    sa.Column('shelved_until', sa.DateTime(timezone=True), nullable=True),
    sa.Column('shelve_reason', sa.Text(), nullable=True),
    sa.Column('shelved_by', sa.String(length=64), nullable=True),
    sa.Column('rule_override', sa.JSON(), nullable=True),
    sa.PrimaryKeyConstraint('asset_id', name=op.f('pk_assets'))
    )
    op.create_table('audit_log',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('actor', sa.String(length=128), nullable=False),
    sa.Column('action', sa.String(length=64), nullable=False),
    sa.Column('target', sa.String(length=256), nullable=False),
    sa.Column('details', sa.JSON(), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_log'))
    )
    op.create_index('ix_audit_log_at', 'audit_log', ['at'], unique=False)
    op.create_table('readings',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('ts_ms', sa.BigInteger(), nullable=False),
    sa.Column('values', sa.JSON(), nullable=False),
    sa.Column('received_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['asset_id'], ['assets.asset_id'], name=op.f('fk_readings_asset_id_assets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_readings')),
    sa.UniqueConstraint('asset_id', 'ts_ms', name=op.f('uq_readings_asset_id_ts_ms'))
    )
    op.create_index('ix_readings_asset_ts', 'readings', ['asset_id', 'ts_ms'], unique=False)
    op.create_table('skipped_windows',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('model_version', sa.String(length=64), nullable=False),
    sa.Column('window_end_index', sa.BigInteger(), nullable=False),
    sa.Column('window_end_ms', sa.BigInteger(), nullable=False),
    sa.Column('reason', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['asset_id'], ['assets.asset_id'], name=op.f('fk_skipped_windows_asset_id_assets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_skipped_windows')),
    sa.UniqueConstraint('asset_id', 'model_id', 'model_version', 'window_end_index', name=op.f('uq_skipped_windows_asset_id_model_id_model_version_window_end_index'))
    )
    op.create_index('ix_skipped_windows_asset_end', 'skipped_windows', ['asset_id', 'window_end_ms'], unique=False)
    op.create_table('threshold_versions',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('version', sa.Integer(), nullable=False),
    sa.Column('warning', sa.Float(), nullable=False),
    sa.Column('critical', sa.Float(), nullable=False),
    sa.Column('on_k', sa.Integer(), nullable=False),
    sa.Column('on_n', sa.Integer(), nullable=False),
    sa.Column('off_m', sa.Integer(), nullable=False),
    sa.Column('deadband_frac', sa.Float(), nullable=False),
    sa.Column('origin', sa.String(length=16), nullable=False),
    sa.Column('budget_per_week', sa.Float(), nullable=True),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('created_by', sa.String(length=128), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('model_version', sa.String(length=64), nullable=False),
    sa.ForeignKeyConstraint(['asset_id'], ['assets.asset_id'], name=op.f('fk_threshold_versions_asset_id_assets')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_threshold_versions')),
    sa.UniqueConstraint('asset_id', 'version', name=op.f('uq_threshold_versions_asset_id_version'))
    )
    op.create_table('alerts',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('severity', sa.String(length=16), nullable=False),
    sa.Column('state', sa.String(length=16), nullable=False),
    sa.Column('condition', sa.String(length=16), nullable=False),
    sa.Column('active_key', sa.String(length=64), nullable=True),
    sa.Column('opened_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('last_seen_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('returned_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('peak_score', sa.Float(), nullable=False),
    sa.Column('peak_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('top_channels', sa.JSON(), nullable=False),
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('model_version', sa.String(length=64), nullable=False),
    sa.Column('threshold_version_id', sa.Integer(), nullable=True),
    sa.Column('acknowledged_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('acknowledged_by', sa.String(length=128), nullable=True),
    sa.Column('closed_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('closed_by', sa.String(length=128), nullable=True),
    sa.Column('outcome', sa.String(length=32), nullable=True),
    sa.Column('close_note', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['asset_id'], ['assets.asset_id'], name=op.f('fk_alerts_asset_id_assets')),
    sa.ForeignKeyConstraint(['threshold_version_id'], ['threshold_versions.id'], name=op.f('fk_alerts_threshold_version_id_threshold_versions')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_alerts')),
    sa.UniqueConstraint('active_key', name=op.f('uq_alerts_active_key'))
    )
    op.create_index('ix_alerts_asset_opened', 'alerts', ['asset_id', 'opened_at'], unique=False)
    op.create_index('ix_alerts_opened_id', 'alerts', ['opened_at', 'id'], unique=False)
    op.create_table('window_scores',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('asset_id', sa.String(length=64), nullable=False),
    sa.Column('model_id', sa.String(length=64), nullable=False),
    sa.Column('model_version', sa.String(length=64), nullable=False),
    sa.Column('window_end_index', sa.BigInteger(), nullable=False),
    sa.Column('window_end_ms', sa.BigInteger(), nullable=False),
    sa.Column('score', sa.Float(), nullable=False),
    sa.Column('contributions', sa.JSON(), nullable=False),
    sa.Column('threshold_version_id', sa.Integer(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['asset_id'], ['assets.asset_id'], name=op.f('fk_window_scores_asset_id_assets')),
    sa.ForeignKeyConstraint(['threshold_version_id'], ['threshold_versions.id'], name=op.f('fk_window_scores_threshold_version_id_threshold_versions')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_window_scores')),
    sa.UniqueConstraint('asset_id', 'model_id', 'model_version', 'window_end_index', name=op.f('uq_window_scores_asset_id_model_id_model_version_window_end_index'))
    )
    op.create_index('ix_window_scores_asset_end', 'window_scores', ['asset_id', 'window_end_ms'], unique=False)
    op.create_table('alert_events',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('alert_id', sa.Integer(), nullable=False),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('kind', sa.String(length=16), nullable=False),
    sa.Column('actor', sa.String(length=128), nullable=False),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('details', sa.JSON(), nullable=True),
    sa.ForeignKeyConstraint(['alert_id'], ['alerts.id'], name=op.f('fk_alert_events_alert_id_alerts')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_alert_events'))
    )
    op.create_index('ix_alert_events_alert_at', 'alert_events', ['alert_id', 'at'], unique=False)


def downgrade() -> None:
    op.drop_index('ix_alert_events_alert_at', table_name='alert_events')
    op.drop_table('alert_events')
    op.drop_index('ix_window_scores_asset_end', table_name='window_scores')
    op.drop_table('window_scores')
    op.drop_index('ix_alerts_opened_id', table_name='alerts')
    op.drop_index('ix_alerts_asset_opened', table_name='alerts')
    op.drop_table('alerts')
    op.drop_table('threshold_versions')
    op.drop_index('ix_skipped_windows_asset_end', table_name='skipped_windows')
    op.drop_table('skipped_windows')
    op.drop_index('ix_readings_asset_ts', table_name='readings')
    op.drop_table('readings')
    op.drop_index('ix_audit_log_at', table_name='audit_log')
    op.drop_table('audit_log')
    op.drop_table('assets')
    op.drop_table('api_keys')
