"""Drift events and reference points, bearer tokens, audit trail.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

Id = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    op.create_table(
        "drift_events",
        sa.Column("id", Id, primary_key=True, autoincrement=True),
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), nullable=False),
        sa.Column("at", sa.Double, nullable=False),
        sa.Column("seq", sa.BigInteger, nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("statistic", sa.String(64), nullable=False),
        sa.Column("value", sa.Double, nullable=True),
        sa.Column("threshold", sa.Double, nullable=True),
        sa.Column("since_seq", sa.BigInteger, nullable=True),
        sa.Column("detail", sa.Text, nullable=True),
    )
    op.create_index("ix_drift_events_model", "drift_events", ["model_id", "id"])
    op.create_table(
        "drift_references",
        sa.Column("model_id", Id, sa.ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("kind", sa.String(16), nullable=False),
        sa.Column("snapshot_id", Id, sa.ForeignKey("snapshots.id", ondelete="SET NULL"), nullable=True),
        sa.Column("seq", sa.BigInteger, nullable=False),
        sa.Column("version", sa.BigInteger, nullable=False),
        sa.Column("at", sa.Double, nullable=False),
    )
    op.create_table(
        "tokens",
        sa.Column("id", Id, primary_key=True, autoincrement=True),
        sa.Column("label", sa.String(200), nullable=False),
        sa.Column("scope", sa.String(16), nullable=False),
        sa.Column("models", sa.String(200), nullable=True),
        sa.Column("digest", sa.String(128), nullable=False, unique=True),
        sa.Column("created", sa.Double, nullable=False),
        sa.Column("revoked", sa.Double, nullable=True),
    )
    op.create_table(
        "audit",
        sa.Column("id", Id, primary_key=True, autoincrement=True),
        sa.Column("at", sa.Double, nullable=False),
        sa.Column("token_label", sa.String(200), nullable=True),
        sa.Column("action", sa.String(64), nullable=False),
        sa.Column("model", sa.String(128), nullable=True),
        sa.Column("version_before", sa.BigInteger, nullable=True),
        sa.Column("version_after", sa.BigInteger, nullable=True),
        sa.Column("outcome", sa.String(16), nullable=False),
        sa.Column("status", sa.Integer, nullable=False),
        sa.Column("detail", sa.Text, nullable=True),
    )
    op.create_index("ix_audit_at", "audit", ["at"])
    op.create_index("ix_audit_model", "audit", ["model"])


def downgrade() -> None:
    op.drop_index("ix_audit_model", "audit")
    op.drop_index("ix_audit_at", "audit")
    op.drop_table("audit")
    op.drop_table("tokens")
    op.drop_table("drift_references")
    op.drop_index("ix_drift_events_model", "drift_events")
    op.drop_table("drift_events")
