"""The :class:`Store`: an engine plus read and write transactions."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy.engine import Connection, Engine

from .database import WRITE, migrate, open_engine

__all__ = ["Store"]


class Store:
    """Database access for the registry. ``read()`` / ``write()`` yield a connection inside a transaction."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    @classmethod
    def open(cls, url: str, *, pool_size: int = 8, run_migrations: bool = True) -> "Store":
        engine = open_engine(url, pool_size=pool_size)
        if run_migrations:
            migrate(engine)
        return cls(engine)

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

    @contextmanager
    def write(self) -> Iterator[Connection]:
        """A write transaction: committed when the block ends, rolled back on an exception."""
        with self.engine.connect().execution_options(**{WRITE: True}) as conn:
            with conn.begin():
                yield conn

    def close(self) -> None:
        self.engine.dispose()
