"""Store.group_write: the group writer's transactions, on a connection of its own on SQLite.

A committed group write is visible to every other connection and a failed one
leaves nothing behind, on both databases. On SQLite the writer's transactions
run on one kept connection (its page cache then stays valid between groups),
replaced after an error, and the ``BEGIN IMMEDIATE`` the store issues on the
driver's connection still reports a lock held elsewhere as SQLAlchemy's
``OperationalError`` once the busy timeout has passed (SQLite documentation,
"BEGIN TRANSACTION": an IMMEDIATE transaction takes the write lock at once and
another waits for it, then fails with SQLITE_BUSY).
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from sqlalchemy.engine import Connection
from sqlalchemy.exc import OperationalError

from leastwise.store import CheckpointRow, Store
from leastwise.store import queries as q


def _names(store: Store) -> list[str]:
    with store.read() as conn:
        return [row[0] for row in conn.exec_driver_sql("SELECT name FROM models ORDER BY name")]


def test_a_group_write_commits_and_a_failed_one_leaves_nothing(database_url):
    store = Store.open(database_url)
    try:
        with store.group_write() as conn:
            q.insert_model(conn, "kept", "{}", 0.0, CheckpointRow(1, 0, b"", b""))
        with pytest.raises(RuntimeError):
            with store.group_write() as conn:
                q.insert_model(conn, "dropped", "{}", 0.0, CheckpointRow(1, 0, b"", b""))
                raise RuntimeError("the group failed")
        with store.group_write() as conn:  # the writer goes on after a failure
            q.insert_model(conn, "after", "{}", 0.0, CheckpointRow(1, 0, b"", b""))
        assert _names(store) == ["after", "kept"]
    finally:
        store.close()


def test_sqlite_group_writes_keep_one_connection_until_an_error(tmp_path: Path):
    store = Store.open(f"sqlite:///{tmp_path / 'w.sqlite3'}")
    try:
        def connection() -> Connection:
            with store.group_write() as conn:
                return conn

        first = connection()
        assert connection() is first and not first.closed
        with pytest.raises(RuntimeError), store.group_write():
            raise RuntimeError("the group failed")
        assert first.closed  # given back to the pool, rolled back
        replaced = connection()
        assert replaced is not first
        assert connection() is replaced
    finally:
        store.close()
    assert replaced.closed  # closed with the store


def test_sqlite_write_lock_held_elsewhere_is_an_operational_error(tmp_path: Path):
    path = tmp_path / "l.sqlite3"
    store = Store.open(f"sqlite:///{path}")
    other = sqlite3.connect(path, isolation_level=None)
    try:
        other.execute("BEGIN IMMEDIATE")  # another process's writer holds the lock
        with store.engine.connect() as conn:
            conn.connection.driver_connection.execute("PRAGMA busy_timeout=50")
        with pytest.raises(OperationalError, match="locked"):
            with store.write():
                pass
        other.execute("ROLLBACK")
        with store.write() as conn:  # the lock released: the same pooled connection writes
            q.insert_model(conn, "m", "{}", 0.0, CheckpointRow(1, 0, b"", b""))
        assert _names(store) == ["m"]
    finally:
        other.close()
        store.close()
