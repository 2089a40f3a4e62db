"""stream core: window_scores.rule_saw and alerts.backfilled

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-03

The streaming core (service/stream.py) stores a late window that fills a hole behind the
alert rule's last window with rule_saw false, and rebuilds the rule's state only from
windows it saw, so the state never depends on how readings were batched. Alerts opened by
a backfill of history (issue 12) are marked backfilled and send no notifications.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0003'
down_revision: str | None = '0002'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column('window_scores', sa.Column('rule_saw', sa.Boolean(), server_default=sa.true(), nullable=False))
    op.add_column('alerts', sa.Column('backfilled', sa.Boolean(), server_default=sa.false(), nullable=False))


def downgrade() -> None:
    with op.batch_alter_table('alerts') as batch:
        batch.drop_column('backfilled')
    with op.batch_alter_table('window_scores') as batch:
        batch.drop_column('rule_saw')
