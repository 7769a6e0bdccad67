"""Initial schema: models, observation log, checkpoints, snapshots, idempotency keys.

Revision ID: 0001
Revises:
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

Id = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "models",
        sa.Column("id", Id, primary_key=True, autoincrement=True),
        sa.Column("name", sa.String(128), nullable=False, unique=True),
        sa.Column("config", sa.Text, nullable=False),
        sa.Column("version", sa.BigInteger, nullable=False),
        sa.Column("seq", sa.BigInteger, nullable=False),
        sa.Column("epoch", sa.BigInteger, nullable=False),
        sa.Column("created", sa.Double, nullable=False),
    )
    op.create_table(
        "observations",
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("seq", sa.BigInteger, primary_key=True),
        sa.Column("x", sa.LargeBinary, nullable=False),
        sa.Column("y", sa.Double, nullable=False),
        sa.Column("t", sa.Double, nullable=True),
        sa.Column("key", sa.String(200), nullable=True),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("received", sa.Double, nullable=False),
    )
    op.create_table(
        "checkpoints",
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("version", sa.BigInteger, primary_key=True),
        sa.Column("seq", sa.BigInteger, nullable=False),
        sa.Column("state", sa.LargeBinary, nullable=False),
        sa.Column("drift", sa.LargeBinary, nullable=False),
        sa.Column("created", sa.Double, nullable=False),
    )
    op.create_table(
        "snapshots",
        sa.Column("id", Id, primary_key=True, autoincrement=True),
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), nullable=False),
        sa.Column("label", sa.String(200), nullable=True),
        sa.Column("created", sa.Double, nullable=False),
        sa.Column("version", sa.BigInteger, nullable=False),
        sa.Column("n", sa.BigInteger, nullable=False),
        sa.Column("state", sa.LargeBinary, nullable=False),
        sa.Column("drift", sa.LargeBinary, nullable=False),
    )
    op.create_index("ix_snapshots_model", "snapshots", ["model_id"])
    op.create_table(
        "idempotency_keys",
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("key", sa.String(200), primary_key=True),
        sa.Column("seq", sa.BigInteger, nullable=False),
        sa.UniqueConstraint("model_id", "key", name="uq_idempotency_model_key"),
    )


def downgrade() -> None:
    for name in ("idempotency_keys", "snapshots", "checkpoints", "observations", "models"):
        op.drop_table(name)
