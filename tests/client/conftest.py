"""A live ``leastwise serve`` process (SQLite) shared by a module's tests, and a fresh model name per test."""

from __future__ import annotations

import itertools
from collections.abc import Iterator

import pytest

from leastwise_client import Client
from tests.support.server import LeastwiseServer, module_server

_names = itertools.count(1)


@pytest.fixture(scope="module")
def live_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LeastwiseServer]:
    yield from module_server(tmp_path_factory, "client-server")


@pytest.fixture
def lw(live_server: LeastwiseServer) -> Iterator[Client]:
    with Client(live_server.url, timeout=10.0, trust_env=False) as client:
        yield client


@pytest.fixture
def name() -> str:
    return f"gw-test-{next(_names)}"
