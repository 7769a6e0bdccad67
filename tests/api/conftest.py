"""In-process API fixtures: a FastAPI TestClient on a fresh SQLite file."""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from leastwise.api import create_app
from leastwise.settings import Settings

PROBLEM = "application/problem+json"


def make_client(database: str, **settings) -> TestClient:
    app = create_app(Settings(database=database, **settings))
    return TestClient(app, raise_server_exceptions=False)


@pytest.fixture
def client(tmp_path: Path) -> Iterator[TestClient]:
    c = make_client(f"sqlite:///{tmp_path / 'api.sqlite3'}", max_batch=50, max_body_bytes=64 * 1024)
    yield c
    c.app.state.registry.store.close()


@pytest.fixture
def model(client: TestClient) -> str:
    r = client.put("/v1/models/chiller-1", json={"features": ["load_kw", "condenser_c"], "intercept": True})
    assert r.status_code == 201, r.text
    return "chiller-1"


def assert_problem(response, status: int | None = None) -> dict:
    assert 400 <= response.status_code < 500, (response.status_code, response.text)
    if status is not None:
        assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith(PROBLEM)
    body = response.json()
    for key in ("type", "title", "status", "detail"):
        assert key in body, body
    assert body["status"] == response.status_code
    return body
