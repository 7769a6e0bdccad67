"""The fast lane answers its two routes exactly as the router does (same bodies, statuses, headers)."""

from __future__ import annotations

import warnings

import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from leastwise.api import create_app
from leastwise.api.fastlane import FastLane, lane_entry
from leastwise.api.middleware import RequestLog


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


class _Counting:
    """A layer put on top of the built middleware stack: counts the requests that enter the full stack."""

    def __init__(self, app) -> None:  # noqa: ANN001
        self.app, self.calls = app, 0

    async def __call__(self, scope, receive, send) -> None:  # noqa: ANN001
        self.calls += 1
        await self.app(scope, receive, send)


def test_hot_routes_enter_below_the_frameworks_outer_layers(client: TestClient, model: str):
    app = client.app
    entry = lane_entry(app)
    assert isinstance(entry, RequestLog)  # only the framework's pass-through layers lie above it
    assert client.get(f"/v1/models/{model}").status_code == 200  # the first hot request finds the entry
    counting = app.middleware_stack = _Counting(app.middleware_stack)
    posts = entry.tally.durations["observations"]
    before = posts.cumulative()[-1][1]
    assert client.post(f"/v1/models/{model}/observations", json={"x": [1.0, 2.0], "y": 3.0}).status_code == 200
    assert client.get(f"/v1/models/{model}").status_code == 200
    assert counting.calls == 0
    assert client.get("/v1/models").status_code == 200  # every other route takes the full stack
    assert client.get(f"/v1/models/{model}/drift").status_code == 200
    assert counting.calls == 2
    assert posts.cumulative()[-1][1] == before + 1  # the lane passes the request log, which counts the post


def test_a_framework_body_limit_turns_the_lane_off(client: TestClient):
    app = create_app(client.app.state.settings, registry=client.app.state.registry)
    app.max_body_size = 1024  # a limit the framework's own layer would apply: the lane must not skip it
    assert lane_entry(app) is None


def test_an_error_escaping_the_lane_gets_the_server_error_answer(client: TestClient, model: str, monkeypatch):
    def broken() -> None:
        raise RuntimeError("token cache broken")

    monkeypatch.setattr(client.app.state.access, "cached", broken)  # fails before any answer is sent
    hot = client.post(f"/v1/models/{model}/observations", json={"x": [1.0, 2.0], "y": 3.0})
    other = client.get("/v1/models")  # the same failure on the full stack: the server-error layer answers
    assert hot.status_code == other.status_code == 500
    assert hot.headers["content-type"] == other.headers["content-type"] == "application/problem+json"
    assert {k: v for k, v in hot.json().items() if k != "instance"} == \
        {k: v for k, v in other.json().items() if k != "instance"}
