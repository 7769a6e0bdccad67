"""The PostgreSQL path works: driver, DDL, DML and visibility across connections."""

from __future__ import annotations

import pytest
import sqlalchemy
from sqlalchemy import create_engine, text


def test_postgres_roundtrip_and_concurrent_visibility(postgres_url: str) -> None:
    assert postgres_url.startswith("postgresql+psycopg://")
    engine = create_engine(postgres_url)
    try:
        with engine.connect() as conn:
            version = conn.execute(text("select version()")).scalar_one()
            assert version.startswith("PostgreSQL ")
            # a fresh database: nothing left over from other tests
            assert conn.execute(
                text("select count(*) from information_schema.tables where table_schema = current_schema()")
            ).scalar_one() == 0

        with engine.begin() as conn:
            conn.execute(text("create table reading (id integer primary key, y double precision not null)"))
            conn.execute(text("insert into reading (id, y) values (1, 1.5), (2, -0.25)"))

        # two connections at once: uncommitted rows stay private, committed rows are shared
        with engine.connect() as writer, engine.connect() as reader:
            assert writer.connection.dbapi_connection is not reader.connection.dbapi_connection
            with writer.begin():
                writer.execute(text("insert into reading (id, y) values (3, 42.0)"))
                assert reader.execute(text("select count(*) from reading")).scalar_one() == 2
                reader.rollback()
            rows = reader.execute(text("select id, y from reading order by id")).all()
            assert [tuple(r) for r in rows] == [(1, 1.5), (2, -0.25), (3, 42.0)]
            reader.rollback()

            # a row lock taken by one connection is seen by the other (NOWAIT fails)
            with writer.begin():
                writer.execute(text("select * from reading where id = 1 for update"))
                with pytest.raises(sqlalchemy.exc.OperationalError):
                    reader.execute(text("select * from reading where id = 1 for update nowait"))
                reader.rollback()
    finally:
        engine.dispose()


def test_each_test_gets_its_own_database(postgres_url: str, postgres_server) -> None:
    other = postgres_server.create_database()
    try:
        assert other != postgres_url
        a, b = create_engine(postgres_url), create_engine(other)
        try:
            with a.begin() as conn:
                conn.execute(text("create table only_here (x integer)"))
            with b.connect() as conn:
                assert conn.execute(text("select to_regclass('only_here')")).scalar_one() is None
        finally:
            a.dispose()
            b.dispose()
    finally:
        postgres_server.drop_database(other)
