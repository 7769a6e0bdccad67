"""Store.group_write: the group writer's transactions, on a connection of its own.

A committed group write is visible to every other connection and a failed one
leaves nothing behind, on both databases. The writer's transactions run on
one kept connection, replaced after an error; on PostgreSQL one found dead
after a pause is replaced before the transaction (the server ends it here with
``pg_terminate_backend``, as a restart or failover would), while one lost in
use fails that transaction only. The ``BEGIN IMMEDIATE`` the store issues on the
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
from sqlalchemy.exc import DBAPIError, OperationalError

from leastwise.store import CheckpointRow, Store
from leastwise.store.store import KEPT_IDLE_CHECK
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


def test_group_writes_keep_one_connection_until_an_error(database_url):
    store = Store.open(database_url)
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


def _kept_then_ended(store: Store) -> Connection:
    """The writer's kept connection after its server process was ended from another one, as a restart would."""
    with store.group_write() as conn:
        kept = conn
    pid = kept.connection.driver_connection.info.backend_pid
    with store.engine.connect() as other:
        other.exec_driver_sql(f"SELECT pg_terminate_backend({pid})")
        other.commit()
    return kept


def _insert(store: Store, name: str) -> Connection:
    with store.group_write() as conn:
        q.insert_model(conn, name, "{}", 0.0, CheckpointRow(1, 0, b"", b""))
    return conn


def test_postgres_connection_lost_while_idle_is_replaced_before_the_transaction(postgres_url):
    store = Store.open(postgres_url)
    try:
        kept = _kept_then_ended(store)
        store._kept_used -= KEPT_IDLE_CHECK + 1.0  # unused long enough to be checked first
        assert _insert(store, "after-pause") is not kept
        assert _names(store) == ["after-pause"]
    finally:
        store.close()


def test_postgres_connection_lost_in_use_fails_one_transaction(postgres_url):
    store = Store.open(postgres_url)
    try:
        _kept_then_ended(store)  # just used: not checked, the transaction finds it gone
        with pytest.raises(DBAPIError):
            _insert(store, "lost")
        _insert(store, "next")  # the next one reconnects
        assert _names(store) == ["next"]
    finally:
        store.close()


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
