"""The database schema (SQLAlchemy Core). Changes go through a migration in ``migrations/versions``.

* ``models``: one row per model; ``version`` grows with every change, ``seq``
  is the last observation log sequence number, ``epoch`` grows when the state
  is replaced wholesale (reset, restore) so readers know the log alone cannot
  bring them up to date.
* ``observations``: the append-only log (x as raw little-endian float64 bytes,
  y and t as IEEE doubles: replay sees exactly the numbers that were applied).
* ``checkpoints``: serialised state (engine bytes and residual-statistics bytes) at a log position.
* ``snapshots``: operator-named copies of a state.
* ``idempotency_keys``: every observation key seen per model (kept when the log is compacted).
* ``drift_events``: drift status changes and alarms per model (statistic, value, threshold, since).
* ``drift_references``: the reference point the drift statistics run from (start, reset or a snapshot).
* ``tokens``: bearer tokens, stored only as hashes, with scope and model-name pattern.
* ``audit``: operator actions and refused attempts, with the state version before and after.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Column,
    Double,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

__all__ = [
    "metadata", "models", "observations", "checkpoints", "snapshots", "idempotency_keys",
    "drift_events", "drift_references", "tokens", "audit",
]

metadata = MetaData()

# BigInteger on PostgreSQL, INTEGER (so rowid autoincrement works) on SQLite.
Id = BigInteger().with_variant(Integer(), "sqlite")

models = Table(
    "models",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("name", String(128), nullable=False, unique=True),
    Column("config", Text, nullable=False),
    Column("version", BigInteger, nullable=False),
    Column("seq", BigInteger, nullable=False),
    Column("epoch", BigInteger, nullable=False),
    Column("created", Double, nullable=False),
)

observations = Table(
    "observations",
    metadata,
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
    Column("seq", BigInteger, primary_key=True),
    Column("x", LargeBinary, nullable=False),
    Column("y", Double, nullable=False),
    Column("t", Double, nullable=True),
    Column("key", String(200), nullable=True),
    Column("status", String(16), nullable=False),
    Column("received", Double, nullable=False),
    # seq of the first row of the block this row was absorbed with (NULL: absorbed on its own)
    Column("block", BigInteger, nullable=True),
)

checkpoints = Table(
    "checkpoints",
    metadata,
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
    Column("version", BigInteger, primary_key=True),
    Column("seq", BigInteger, nullable=False),
    Column("state", LargeBinary, nullable=False),
    Column("drift", LargeBinary, nullable=False),
    Column("created", Double, nullable=False),
)

snapshots = Table(
    "snapshots",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), nullable=False),
    Column("label", String(200), nullable=True),
    Column("created", Double, nullable=False),
    Column("version", BigInteger, nullable=False),
    Column("n", BigInteger, nullable=False),
    Column("state", LargeBinary, nullable=False),
    Column("drift", LargeBinary, nullable=False),
    Index("ix_snapshots_model", "model_id"),
)

idempotency_keys = Table(
    "idempotency_keys",
    metadata,
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
    Column("key", String(200), primary_key=True),
    Column("seq", BigInteger, nullable=False),
    UniqueConstraint("model_id", "key", name="uq_idempotency_model_key"),
)

drift_events = Table(
    "drift_events",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), nullable=False),
    Column("at", Double, nullable=False),
    Column("seq", BigInteger, nullable=False),
    Column("status", String(16), nullable=False),
    Column("statistic", String(64), nullable=False),
    Column("value", Double, nullable=True),
    Column("threshold", Double, nullable=True),
    Column("since_seq", BigInteger, nullable=True),
    Column("detail", Text, nullable=True),
    Index("ix_drift_events_model", "model_id", "id"),
)

drift_references = Table(
    "drift_references",
    metadata,
    Column("model_id", Id, ForeignKey("models.id", ondelete="CASCADE"), primary_key=True),
    Column("kind", String(16), nullable=False),
    Column("snapshot_id", Id, ForeignKey("snapshots.id", ondelete="SET NULL"), nullable=True),
    Column("seq", BigInteger, nullable=False),
    Column("version", BigInteger, nullable=False),
    Column("at", Double, nullable=False),
)

tokens = Table(
    "tokens",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("label", String(200), nullable=False),
    Column("scope", String(16), nullable=False),
    Column("models", String(200), nullable=True),
    Column("digest", String(128), nullable=False, unique=True),
    Column("created", Double, nullable=False),
    Column("revoked", Double, nullable=True),
)

audit = Table(
    "audit",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("at", Double, nullable=False),
    Column("token_label", String(200), nullable=True),
    Column("action", String(64), nullable=False),
    Column("model", String(128), nullable=True),
    Column("version_before", BigInteger, nullable=True),
    Column("version_after", BigInteger, nullable=True),
    Column("outcome", String(16), nullable=False),
    Column("status", Integer, nullable=False),
    Column("detail", Text, nullable=True),
    Index("ix_audit_at", "at"),
    Index("ix_audit_model", "model"),
)
