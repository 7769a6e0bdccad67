"""Schema: migrations run on open, are recorded in a version table and are idempotent; SQLite pragmas."""

from __future__ import annotations

import sqlite3

from sqlalchemy import inspect, text

from leastwise.store import Store, migrate
from leastwise.store.database import SQLITE_PAGE_SIZE

HEAD = "0003"  # the newest revision in service/leastwise/store/migrations/versions


def test_migrations_create_tables_and_version(sqlite_url):
    store = Store.open(sqlite_url)
    names = set(inspect(store.engine).get_table_names())
    assert {"models", "observations", "checkpoints", "snapshots", "idempotency_keys", "alembic_version",
            "drift_events", "drift_references", "tokens", "audit"} <= names
    with store.read() as conn:
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == HEAD
    assert migrate(store.engine) == HEAD  # again: nothing to do
    store.close()


def test_sqlite_durability_pragmas(sqlite_url):
    store = Store.open(sqlite_url)
    with store.read() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA synchronous").scalar() == 2  # FULL
    store.close()


def test_new_sqlite_database_gets_small_pages(sqlite_url):
    store = Store.open(sqlite_url)
    with store.read() as conn:
        assert conn.exec_driver_sql("PRAGMA page_size").scalar() == SQLITE_PAGE_SIZE == 2048
    store.close()


def test_existing_sqlite_database_keeps_its_page_size(tmp_path):
    """A database made before the page size was set (SQLite's default 4 KiB) opens and works as it is."""
    path = tmp_path / "older.sqlite3"
    raw = sqlite3.connect(path)
    raw.execute("PRAGMA page_size=4096")
    raw.execute("PRAGMA journal_mode=WAL")
    raw.execute("CREATE TABLE kept (v INTEGER)")
    raw.execute("INSERT INTO kept VALUES (7)")
    raw.commit()
    raw.close()
    store = Store.open(f"sqlite:///{path}")
    with store.write() as conn:
        conn.exec_driver_sql("INSERT INTO kept VALUES (8)")
    with store.read() as conn:
        assert conn.exec_driver_sql("PRAGMA page_size").scalar() == 4096
        assert [r[0] for r in conn.exec_driver_sql("SELECT v FROM kept ORDER BY v")] == [7, 8]
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == HEAD
    store.close()


def test_postgres_schema(postgres_url):
    store = Store.open(postgres_url)
    assert "observations" in inspect(store.engine).get_table_names()
    assert {"tokens", "audit", "drift_events"} <= set(inspect(store.engine).get_table_names())
    assert migrate(store.engine) == HEAD
    store.close()


def _database_at(url: str, revision: str, *statements: tuple[str, dict]) -> None:
    """Create a database at an older ``revision`` and run ``statements`` in it, as that release would."""
    from alembic import command
    from sqlalchemy import create_engine

    from leastwise.store.database import alembic_config

    engine = create_engine(url)
    cfg = alembic_config()
    with engine.connect() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)
        for sql, params in statements:
            conn.execute(text(sql), params)
        conn.commit()
    engine.dispose()


def test_upgrade_from_the_first_release(sqlite_url):
    # A database created by release 0001 upgrades in place and keeps its rows.
    _database_at(sqlite_url, "0001", ("INSERT INTO models (name, config, version, seq, epoch, created) "
                                      "VALUES ('old', '{}', 1, 0, 0, 0.0)", {}))
    store = Store.open(sqlite_url)
    with store.read() as conn:
        assert conn.execute(text("SELECT name FROM models")).scalar_one() == "old"
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == HEAD
    store.close()


def test_upgrade_to_log_blocks_keeps_the_log(sqlite_url):
    # Revision 0003 adds observations.block; rows logged before it read back as absorbed one by one.
    from leastwise.store.drift import log_rows_after

    _database_at(sqlite_url, "0002",
                 ("INSERT INTO models (id, name, config, version, seq, epoch, created) "
                  "VALUES (1, 'old', '{}', 2, 1, 0, 0.0)", {}),
                 ("INSERT INTO observations (model_id, seq, x, y, t, key, status, received) "
                  "VALUES (1, 1, :x, 2.5, NULL, 'k1', 'applied', 0.0)", {"x": b"\x00" * 8}))
    store = Store.open(sqlite_url)
    with store.read() as conn:
        rows = list(log_rows_after(conn, 1, 0))
    assert [(r.seq, r.y, r.key, r.block) for r in rows] == [(1, 2.5, "k1", None)]
    store.close()
