"""The observation log records which rows were absorbed together as one block.

Revision ID: 0003
Revises: 0002

``observations.block``: the ``seq`` of the first row of the block a row was
absorbed with by the engine's blocked update, NULL for a row absorbed on its
own. Replay repeats the same blocks, so it reaches the same state bit for bit.
Rows written before this revision are NULL: they were absorbed one by one.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("observations") as batch:
        batch.add_column(sa.Column("block", sa.BigInteger, nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("observations") as batch:
        batch.drop_column("block")
