"""The fast lane answers its two routes exactly as the router does (same bodies, statuses, headers)."""

from __future__ import annotations

import warnings

import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from leastwise.api import create_app
from leastwise.api.fastlane import FastLane


def _router_client(client: TestClient) -> TestClient:
    """An application on the same registry whose middleware stack lacks the fast lane: the router answers."""
    app = create_app(client.app.state.settings, registry=client.app.state.registry)
    app.user_middleware = [m for m in app.user_middleware if m.cls is not FastLane]
    assert len(app.user_middleware) == len(client.app.user_middleware) - 1
    return TestClient(app, raise_server_exceptions=False)


BAD_BODIES = [
    b"",
    b"{not json",
    b'{"x": [1.0], "y": 2.0}',
    b'{"x": [1.0, NaN], "y": 2.0}',
    b'{"x": [1.0, 2.0], "y": "high"}',
    b'{"observations": [{"x": [1.0, 2.0], "y": 1.0}, {"x": [true, 2.0], "y": 1.0}]}',
    b'{"x": [1.0, 2.0], "y": 1.0, "time": "yesterday"}',
    b'[1, 2, 3]',
]


@pytest.mark.parametrize("raw", BAD_BODIES)
def test_refused_observations_are_answered_alike(client: TestClient, model: str, raw: bytes):
    router = _router_client(client)
    url = f"/v1/models/{model}/observations"
    a = client.post(url, content=raw, headers={"content-type": "application/json"})
    b = router.post(url, content=raw, headers={"content-type": "application/json"})
    assert 400 <= a.status_code < 500
    assert (a.status_code, a.headers["content-type"], a.json()) == (b.status_code, b.headers["content-type"], b.json())


@pytest.mark.parametrize("name", ["no-such-model", "bad name!", "x" * 300])
def test_missing_or_invalid_names_are_answered_alike(client: TestClient, name: str):
    router = _router_client(client)
    for method, url, body in (("POST", f"/v1/models/{name}/observations", {"x": [1.0], "y": 1.0}),
                              ("GET", f"/v1/models/{name}", None)):
        a = client.request(method, url, json=body)
        b = router.request(method, url, json=body)
        assert 400 <= a.status_code < 500
        assert (a.status_code, a.json()) == (b.status_code, b.json())


def test_state_answers_are_identical(client: TestClient, model: str):
    router = _router_client(client)
    for i in range(5):
        assert client.post(f"/v1/models/{model}/observations", json={"x": [i, i * i], "y": 2.0 * i}).status_code == 200
    a = client.get(f"/v1/models/{model}")
    b = router.get(f"/v1/models/{model}")
    assert a.status_code == b.status_code == 200
    assert a.content == b.content and a.headers["etag"] == b.headers["etag"]
    etag = a.headers["etag"]
    assert client.get(f"/v1/models/{model}", headers={"If-None-Match": etag}).status_code == 304
    assert router.get(f"/v1/models/{model}", headers={"If-None-Match": etag}).status_code == 304


def test_other_methods_and_paths_still_reach_the_router(client: TestClient, model: str):
    assert client.request("PATCH", f"/v1/models/{model}").status_code == 405
    assert client.get(f"/v1/models/{model}/observations").status_code == 405
    assert client.delete(f"/v1/models/{model}").status_code == 204
