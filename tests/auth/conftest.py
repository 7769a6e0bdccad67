"""Fixtures for access-control tests: an app on a fresh SQLite file, a model with a snapshot, tokens per scope."""

from __future__ import annotations

import shutil
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from leastwise.api import create_app
from leastwise.settings import Settings

MODEL = "plant-a-1"


@dataclass
class Env:
    client: TestClient
    tokens: dict[str, str]       # label -> token
    ids: dict[str, int]          # label -> token id
    snapshot: int

    def h(self, label: str | None) -> dict[str, str]:
        return {} if label is None else {"Authorization": f"Bearer {self.tokens[label]}"}

    @property
    def access(self):
        return self.client.app.state.access

    def audit(self, **filters) -> list[dict]:
        return self.access.audit(**filters)


def make_env(database: str, **settings) -> Env:
    app = create_app(Settings(database=database, **settings))
    client = TestClient(app, raise_server_exceptions=False)
    r = client.put(f"/v1/models/{MODEL}", json={"features": ["load_kw"], "intercept": True})
    assert r.status_code == 201, r.text
    r = client.post(f"/v1/models/{MODEL}/observations", json={"observations": [{"x": [1.0], "y": 2.0}, {"x": [2.0], "y": 3.5}]})
    assert r.status_code == 200, r.text
    r = client.post(f"/v1/models/{MODEL}/snapshots", json={"label": "before"})
    assert r.status_code == 201, r.text
    snapshot = r.json()["id"]
    tokens, ids = {}, {}
    for label, scope, pattern in [("read", "read", None), ("write", "write", None), ("admin", "admin", None),
                                  ("gw-a", "write", "plant-a-*"), ("gw-b", "write", "plant-b-*"),
                                  ("admin-a", "admin", "plant-a-*")]:
        record, token = app.state.access.create_token(scope, label, pattern)
        tokens[label], ids[label] = token, record.id
    return Env(client, tokens, ids, snapshot)


def _close(app) -> None:
    registry = app.state.registry
    getattr(registry, "close", registry.store.close)()  # stops the writer thread, closes the store


@pytest.fixture(scope="session")
def _template(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Env]:
    """One seeded database, copied for each test (migrating and seeding every time is slow)."""
    path = tmp_path_factory.mktemp("auth-template") / "auth.sqlite3"
    e = make_env(f"sqlite:///{path}")
    _close(e.client.app)
    return path, e


@pytest.fixture
def env(tmp_path: Path, _template: tuple[Path, Env]) -> Iterator[Env]:
    source, seeded = _template
    target = tmp_path / "auth.sqlite3"
    shutil.copyfile(source, target)
    app = create_app(Settings(database=f"sqlite:///{target}"))
    e = Env(TestClient(app, raise_server_exceptions=False), seeded.tokens, seeded.ids, seeded.snapshot)
    yield e
    _close(app)


@pytest.fixture
def open_client(tmp_path: Path) -> Iterator[TestClient]:
    """No tokens configured (loopback): everything open."""
    app = create_app(Settings(database=f"sqlite:///{tmp_path / 'open.sqlite3'}"))
    c = TestClient(app, raise_server_exceptions=False)
    yield c
    _close(app)
