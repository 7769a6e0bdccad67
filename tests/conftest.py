"""Shared fixtures for the whole test-suite.

PostgreSQL (see tests/support/postgres.py):
    postgres_server   session  PostgresServer (.admin_url, .create_database(), .drop_database(url))
    postgres_url      function str, URL of a fresh empty PostgreSQL database

SQLite:
    sqlite_url        function str, ``sqlite:///<tmp_path>/leastwise.sqlite3`` (file not created)

Both backends:
    database_url      function str, parametrised over ["sqlite", "postgresql"]:
                      a test asking for it runs once per backend

Real server processes (see tests/support/server.py):
    server_factory    function callable; every server it made is stopped and reaped at teardown
        server_factory(database=None, *, port=None, env=None, args=(), start=True,
                       startup_timeout=30.0, command=None) -> LeastwiseServer
        database=None means a fresh SQLite file in the test's tmp_path.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path

import pytest

_REPO_ROOT = str(Path(__file__).resolve().parent.parent)
if _REPO_ROOT not in sys.path:  # so ``tests.support`` imports under any --import-mode
    sys.path.insert(0, _REPO_ROOT)

from tests.support.postgres import postgres_server, postgres_url  # noqa: E402,F401  (fixtures)
from tests.support.server import LeastwiseServer  # noqa: E402


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    return f"sqlite:///{tmp_path / 'leastwise.sqlite3'}"


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(request: pytest.FixtureRequest) -> str:
    if request.param == "sqlite":
        return request.getfixturevalue("sqlite_url")
    return request.getfixturevalue("postgres_url")


@pytest.fixture
def server_factory(tmp_path: Path) -> Iterator[Callable[..., LeastwiseServer]]:
    servers: list[LeastwiseServer] = []

    def make(
        database: str | None = None,
        *,
        port: int | None = None,
        env: Mapping[str, str] | None = None,
        args: Sequence[str] = (),
        start: bool = True,
        startup_timeout: float = 30.0,
        command: Sequence[str] | None = None,
    ) -> LeastwiseServer:
        index = len(servers) + 1
        workdir = tmp_path / f"server{index}"
        if database is None:
            workdir.mkdir(parents=True, exist_ok=True)
            database = f"sqlite:///{workdir / 'leastwise.sqlite3'}"
        server = LeastwiseServer(
            database,
            port=port,
            workdir=workdir,
            env=env,
            args=args,
            command=command,
            startup_timeout=startup_timeout,
        )
        servers.append(server)
        if start:
            server.start()
        return server

    try:
        yield make
    finally:
        for server in servers:
            try:
                server.terminate(timeout=5)
            except Exception:  # noqa: BLE001 - reap the rest regardless
                server.kill()
        for server in servers:
            output = server.log_text()
            if output:
                # captured: pytest shows it only for a failing test
                print(f"--- output of {server!r} ---\n{output[-4000:]}")
