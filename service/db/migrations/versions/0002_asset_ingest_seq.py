"""assets.ingest_seq: a counter every ingest that stores readings moves

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01

The ingest path forms and scores windows before it takes the write lock and checks, under
the lock, that the asset's counter has not moved since (service/ingest.py): a change by any
other writer of the asset's readings is seen, not only one that moved its newest reading.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0002'
down_revision: str | None = '0001'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column('assets', sa.Column('ingest_seq', sa.BigInteger(), server_default='0', nullable=False))


def downgrade() -> None:
    with op.batch_alter_table('assets') as batch:
        batch.drop_column('ingest_seq')
