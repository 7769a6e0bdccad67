"""Opening the database: engine options per backend, SQLite durability pragmas, migrations.

SQLite runs in WAL mode with ``synchronous=FULL`` (a commit is on disk before
it returns, so a power cut loses nothing acknowledged) and ``BEGIN IMMEDIATE``
write transactions (the write lock is taken up front, so two writers queue on
``busy_timeout`` instead of failing on a lock upgrade). PostgreSQL is reached
with ``postgresql+psycopg://``; migrations there run under an advisory lock so
several processes may start at once.
"""

from __future__ import annotations

import logging
import sqlite3
import threading
from pathlib import Path

from sqlalchemy import create_engine, event, text
from sqlalchemy.engine import Connection, Engine, make_url
from sqlalchemy.exc import DBAPIError

__all__ = ["open_engine", "migrate", "is_sqlite", "WRITE", "WalCheckpointer"]

log = logging.getLogger("leastwise.store")

#: execution option marking a connection whose transaction will write
WRITE = "leastwise_write"

#: Page size of a new SQLite database (an existing one keeps its own: WAL mode cannot change it).
#: A commit writes every page it dirtied to the log, and with posts spread over many models
#: each model's rows, index entries and version land on pages of their own: 2 KiB pages
#: halve the bytes a commit writes against the default 4 KiB, and cut the writer's time a
#: request by about a tenth with 10,000 models (no change with one; 1 KiB pages cost more
#: per page and slowed 64-row batches). Measured in-process, groups of 15 posts.
SQLITE_PAGE_SIZE = 2048

_MIGRATION_LOCK = 0x6C65617374  # "least"
_MIGRATIONS = Path(__file__).resolve().parent / "migrations"


def is_sqlite(engine: Engine) -> bool:
    return engine.dialect.name == "sqlite"


def open_engine(url: str, *, pool_size: int = 8, wal_autocheckpoint: bool = True) -> Engine:
    """A SQLAlchemy engine for ``url`` (``sqlite:///path`` or ``postgresql+psycopg://...``).

    ``wal_autocheckpoint=False`` (SQLite; no meaning for PostgreSQL): commits
    never copy the WAL back into the database file themselves; a
    :class:`WalCheckpointer` must.
    """
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        database = parsed.database or ""
        if database and database != ":memory:" and not database.startswith("file:"):
            Path(database).expanduser().parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            parsed,
            pool_size=pool_size,
            max_overflow=32,
            connect_args={"check_same_thread": False, "timeout": 30.0},
        )
        _sqlite_hooks(engine, wal_autocheckpoint)
        return engine
    if parsed.get_backend_name() == "postgresql":
        return create_engine(parsed, pool_size=pool_size, max_overflow=32, pool_pre_ping=True)
    raise ValueError(f"unsupported database {parsed.get_backend_name()!r}: use sqlite:/// or postgresql+psycopg://")


def _sqlite_hooks(engine: Engine, wal_autocheckpoint: bool = True) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record) -> None:  # noqa: ANN001
        dbapi_connection.isolation_level = None  # transactions are begun below, explicitly
        cursor = dbapi_connection.cursor()
        cursor.execute(f"PRAGMA page_size={SQLITE_PAGE_SIZE}")  # before the first table exists; else no effect
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA synchronous=FULL")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute("PRAGMA busy_timeout=30000")
        if not wal_autocheckpoint:
            cursor.execute("PRAGMA wal_autocheckpoint=0")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        # On the driver's connection: exec_driver_sql's statement machinery cost ~40 us of a
        # group's ~0.9 ms in the writer thread (in-process, 15 posts a group); errors are raised
        # as SQLAlchemy's exception types, as exec_driver_sql would.
        statement = "BEGIN IMMEDIATE" if conn.get_execution_options().get(WRITE) else "BEGIN"
        try:
            conn.connection.driver_connection.execute(statement)
        except sqlite3.Error as exc:
            raise DBAPIError.instance(statement, (), exc, sqlite3.Error) from exc


class WalCheckpointer:
    """Copies the SQLite write-ahead log back into the database file from a thread of its own.

    By default SQLite does this inside the commit that pushes the WAL past
    1000 pages, so that one request waits for a second round of writes and
    fsyncs of the database file (and with many models a commit dirties many
    pages). Here a PASSIVE checkpoint runs every ``interval`` seconds instead:
    it never blocks writers or readers, commits only append to the WAL and
    fsync it, so durability is unchanged (a restart replays whatever the WAL
    still holds).

    Restarting the log. SQLite writes the WAL from its start again only when
    a write transaction begins on a fully copied log. Under steady writes the
    background copy never finishes between two commits, so the file would
    grow without bound (measured: 160 MB in 8 s at 16 connections), and every
    commit would extend it, which costs ext4 a block allocation, zeroing and
    a journal commit at each fsync: a median 0.34-0.48 ms a commit against
    0.18-0.19 on a reused log (measured with plain sqlite3 on commits of the
    service's shape). So once the background copy
    finds at least ``restart_frames`` frames in the log it marks a restart
    due, and the writer thread calls :meth:`between_writes` when it has no
    transaction open: that copies the few frames written since (nobody
    else writes meanwhile), and the writer's next transaction starts the log
    afresh. One attempt per mark: a long reader elsewhere that keeps the copy
    from finishing costs one short pass per interval, not one per write.
    Only the group writer calls it: with group commit off (a setting for
    comparisons) the log behaves as before.
    """

    def __init__(self, engine: Engine, interval: float = 0.1, restart_frames: int = 1000) -> None:
        self.engine = engine
        self.interval = interval
        self.restart_frames = restart_frames
        self.runs = 0
        self.restart_due = False
        self.restarts = 0  # completed copies handed to the writer (for tests)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="leastwise-wal-checkpoint", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            self.background_pass()

    def background_pass(self) -> None:
        """One run of the thread: copy what can be copied; mark a restart due if the log is long."""
        frames = self.checkpoint()
        if frames is not None and frames[0] >= self.restart_frames:
            self.restart_due = True

    def checkpoint(self, mode: str = "PASSIVE") -> tuple[int, int] | None:
        """Run a checkpoint; (frames in the log, frames copied), or None if it failed."""
        try:
            with self.engine.connect() as conn:
                row = conn.exec_driver_sql(f"PRAGMA wal_checkpoint({mode})").fetchone()
                conn.commit()
            self.runs += 1
        except Exception:  # noqa: BLE001 - retried at the next interval; the WAL keeps every commit meanwhile
            log.warning("WAL checkpoint failed", exc_info=True)
            return None
        return (int(row[1]), int(row[2])) if row is not None else None

    def between_writes(self) -> None:
        """From the writer, with no transaction open: finish the copy if a restart is due (see above)."""
        if not self.restart_due:
            return
        self.restart_due = False
        frames = self.checkpoint()
        if frames is not None and frames[0] == frames[1]:
            self.restarts += 1

    def close(self) -> None:
        self._stop.set()
        self._thread.join(5.0)
        self.checkpoint("TRUNCATE")  # leave a short WAL behind


def alembic_config():  # -> alembic.config.Config (imported lazily: alembic is only needed here)
    """The alembic configuration of the shipped migrations."""
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(_MIGRATIONS))
    return config


def migrate(engine: Engine) -> str:
    """Bring the schema to the newest revision (alembic); returns that revision."""
    from alembic import command
    from alembic.runtime.migration import MigrationContext
    from alembic.script import ScriptDirectory

    config = alembic_config()
    head = ScriptDirectory.from_config(config).get_current_head()
    with engine.connect() as conn:
        if engine.dialect.name == "postgresql":
            conn.execute(text("SELECT pg_advisory_lock(:k)"), {"k": _MIGRATION_LOCK})
            conn.commit()
        try:
            current = MigrationContext.configure(conn).get_current_revision()
            conn.rollback()
            if current != head:
                config.attributes["connection"] = conn
                command.upgrade(config, "head")
                conn.commit()
        finally:
            if engine.dialect.name == "postgresql":
                conn.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": _MIGRATION_LOCK})
                conn.commit()
    return head or ""
