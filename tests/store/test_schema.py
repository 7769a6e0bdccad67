"""Schema: migrations run on open, are recorded in a version table and are idempotent; SQLite pragmas."""

from __future__ import annotations

from sqlalchemy import inspect, text

from leastwise.store import Store, migrate


def test_migrations_create_tables_and_version(sqlite_url):
    store = Store.open(sqlite_url)
    names = set(inspect(store.engine).get_table_names())
    assert {"models", "observations", "checkpoints", "snapshots", "idempotency_keys", "alembic_version"} <= names
    with store.read() as conn:
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == "0001"
    assert migrate(store.engine) == "0001"  # again: nothing to do
    store.close()


def test_sqlite_durability_pragmas(sqlite_url):
    store = Store.open(sqlite_url)
    with store.read() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA synchronous").scalar() == 2  # FULL
    store.close()


def test_postgres_schema(postgres_url):
    store = Store.open(postgres_url)
    assert "observations" in inspect(store.engine).get_table_names()
    assert migrate(store.engine) == "0001"
    store.close()
