"""Schema: migrations run on open, are recorded in a version table and are idempotent; SQLite pragmas."""

from __future__ import annotations

from sqlalchemy import inspect, text

from leastwise.store import Store, migrate

HEAD = "0002"  # the newest revision in service/leastwise/store/migrations/versions


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


def test_postgres_schema(postgres_url):
    store = Store.open(postgres_url)
    assert "observations" in inspect(store.engine).get_table_names()
    assert {"tokens", "audit", "drift_events"} <= set(inspect(store.engine).get_table_names())
    assert migrate(store.engine) == HEAD
    store.close()


def test_upgrade_from_the_first_release(sqlite_url):
    # A database created by release 0001 upgrades in place and keeps its rows.
    from alembic import command
    from sqlalchemy import create_engine

    from leastwise.store.database import alembic_config

    engine = create_engine(sqlite_url)
    cfg = alembic_config()
    with engine.connect() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0001")
        conn.execute(text("INSERT INTO models (name, config, version, seq, epoch, created) "
                          "VALUES ('old', '{}', 1, 0, 0, 0.0)"))
        conn.commit()
    engine.dispose()
    store = Store.open(sqlite_url)
    with store.read() as conn:
        assert conn.execute(text("SELECT name FROM models")).scalar_one() == "old"
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == HEAD
    store.close()
