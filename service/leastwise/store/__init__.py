"""leastwise.store: SQLAlchemy tables and queries (SQLite by default, PostgreSQL for replicas). No maths."""

from .database import WRITE, is_sqlite, migrate, open_engine
from .queries import CheckpointRow, LogRow, ModelRow, PendingWrite, SnapshotRow
from .store import Store

__all__ = ["Store", "open_engine", "migrate", "is_sqlite", "WRITE",
           "ModelRow", "LogRow", "CheckpointRow", "SnapshotRow", "PendingWrite"]
