"""The :class:`Store`: an engine plus read and write transactions."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import DBAPIError

from .database import WRITE, WalCheckpointer, is_sqlite, migrate, open_engine
from .queries import MODEL_VERSION

__all__ = ["Store", "KEPT_IDLE_CHECK"]

#: Seconds the group writer's PostgreSQL connection may stay unused before it is checked first (Store.group_write).
KEPT_IDLE_CHECK = 1.0


class Store:
    """Database access for the registry. ``read()`` / ``write()`` yield a connection inside a transaction."""

    def __init__(self, engine: Engine, checkpointer: WalCheckpointer | None = None) -> None:
        self.engine = engine
        self.checkpointer = checkpointer
        compiled = MODEL_VERSION.compile(dialect=engine.dialect)
        self._version_sql = str(compiled)
        self._version_positional = bool(compiled.positiontup)
        self._dbapi_error = engine.dialect.loaded_dbapi.Error
        # SQLite: one connection kept for the version check (a pool checkout costs twice the query)
        # and the group writer's kept connection needs no check (group_write)
        self._sqlite = is_sqlite(engine)
        self._quick: Any = None
        self._quick_lock = threading.Lock()
        # the group writer's own connection (see group_write)
        self._kept: Connection | None = None
        self._kept_used = 0.0

    @classmethod
    def open(cls, url: str, *, pool_size: int = 8, run_migrations: bool = True,
             background_checkpoints: bool = False, checkpoint_interval: float = 0.1) -> "Store":
        """Open (and migrate) the database; ``background_checkpoints``: SQLite WAL checkpoints off the
        commit path, every ``checkpoint_interval`` seconds (the service's setting, see :class:`WalCheckpointer`)."""
        engine = open_engine(url, pool_size=pool_size, wal_autocheckpoint=not background_checkpoints)
        if run_migrations:
            migrate(engine)
        return cls(engine, WalCheckpointer(engine, checkpoint_interval) if background_checkpoints and is_sqlite(engine) else None)

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    @contextmanager
    def read(self) -> Iterator[Connection]:
        with self.engine.connect() as conn:
            if self.engine.dialect.name == "postgresql":  # one consistent snapshot for load + replay
                conn.execution_options(isolation_level="REPEATABLE READ")
            with conn.begin():
                yield conn

    def model_version(self, name: str) -> tuple[int, int, int, float] | None:
        """``(id, version, epoch, created)`` of the model named ``name``; None if there is none *or the quick read failed*.

        The read path's version check, cheap enough to run on every read: one
        pre-compiled SELECT on a DBAPI connection, without SQLAlchemy's
        statement and transaction machinery (on SQLite a connection kept for
        it: ≈ 5 µs, against ≈ 15 µs with a pool checkout and ≈ 160 µs for
        ``read()`` + ``model_by_name``). A single statement sees the
        newest committed row on both backends (SQLite: an autocommit read of
        the WAL; PostgreSQL: the statement's own snapshot, its implicit
        transaction rolled back when the connection returns to the pool), so
        writes of other processes are seen as before. On None the caller takes
        the full path (``read()``), which reports a missing model or a database
        error the usual way.
        """
        params = (name,) if self._version_positional else {"name": name}
        try:
            if self._sqlite:
                with self._quick_lock:
                    if self._quick is None:
                        self._quick = self.engine.raw_connection()
                    try:
                        row = self._version_row(self._quick, params)
                    except self._dbapi_error:
                        self._quick = None
                        raise
            else:
                dbapi_conn = self.engine.raw_connection()
                try:
                    row = self._version_row(dbapi_conn, params)
                finally:
                    dbapi_conn.close()  # back to the pool (which rolls back an implicit transaction)
        except self._dbapi_error:
            return None
        return (int(row[0]), int(row[1]), int(row[2]), float(row[3])) if row is not None else None

    def _version_row(self, dbapi_conn: Any, params: Any) -> Any:
        """The version row (None: no such model); on a database error the connection is invalidated first."""
        try:
            cursor = dbapi_conn.cursor()
            try:
                cursor.execute(self._version_sql, params)
                return cursor.fetchone()
            finally:
                cursor.close()
        except self._dbapi_error:
            dbapi_conn.invalidate()  # possibly broken: never used or pooled again
            raise

    @contextmanager
    def write(self) -> Iterator[Connection]:
        """A write transaction: committed when the block ends, rolled back on an exception."""
        with self.engine.connect().execution_options(**{WRITE: True}) as conn:
            with conn.begin():
                yield conn

    @contextmanager
    def group_write(self) -> Iterator[Connection]:
        """:meth:`write` for the one thread that commits the group writes (models/writer.py).

        The transaction runs on a connection kept for that thread. On SQLite
        a connection keeps its page cache only while no other connection has
        written since its last transaction, and a pooled connection is a
        different one each time (the pool hands them out in turn), so every
        group read back the B-tree pages it was about to change (~11 page
        reads a group, seen with strace at 16 connections); the kept
        connection is only the writer's, so its cache stays valid. On
        PostgreSQL the pool's check of a connection before each checkout and
        its rollback on return cost two round trips a group (a one-statement
        transaction: 423 against 285 us, 276 against 173 us of client CPU);
        the kept connection is checked only after ``KEPT_IDLE_CHECK`` seconds
        unused (a server restart or failover most likely happened then). After
        any error the connection is closed and a fresh one opened for the next
        transaction, so a connection lost while in use fails one group (its
        requests get 503 and nothing is applied) and the next reconnects.
        """
        conn = self._kept
        if conn is not None and not self._sqlite and time.monotonic() - self._kept_used > KEPT_IDLE_CHECK:
            try:
                conn.exec_driver_sql("SELECT 1")
                conn.rollback()
            except DBAPIError:  # SQLAlchemy wraps the driver's errors
                self._kept = None
                conn.close()
                conn = None
        if conn is None:
            conn = self._kept = self.engine.connect().execution_options(**{WRITE: True})
        try:
            with conn.begin():
                yield conn
        except BaseException:
            self._kept = None
            conn.close()
            raise
        finally:
            self._kept_used = time.monotonic()

    def between_writes(self) -> None:
        """Housekeeping a writer runs with no transaction open (SQLite: :meth:`WalCheckpointer.between_writes`)."""
        if self.checkpointer is not None:
            self.checkpointer.between_writes()

    def close(self) -> None:
        with self._quick_lock:
            quick, self._quick = self._quick, None
        if quick is not None:
            quick.close()
        kept, self._kept = self._kept, None
        if kept is not None:
            kept.close()
        checkpointer, self.checkpointer = self.checkpointer, None
        if checkpointer is not None:
            checkpointer.close()
        self.engine.dispose()
