"""Problem details become typed exceptions: live answers where the service gives them, a mock transport for the rest."""

from __future__ import annotations

import json

import httpx
import pytest

from leastwise_client import (
    BadRequest, Busy, Client, Conflict, Forbidden, InvalidInput, LeastwiseError, NotFound, PayloadTooLarge, Problem,
    RequestTimeout, ServerError, ServiceUnavailable, TooManyRequests, Unauthorized, Unreachable,
)
from leastwise_client.errors import problem_from_response

BASE = "https://leastwise.dev/problems/"


def test_not_found_model_and_snapshot(lw: Client, name: str):
    with pytest.raises(NotFound) as e:
        lw.model(name)
    assert e.value.status == 404 and e.value.slug == "not-found" and name in e.value.detail
    assert e.value.type == BASE + "not-found" and e.value.title
    lw.create_model(name, ["a"])
    with pytest.raises(NotFound):
        lw.restore(name, 9999)


def test_conflict_names_the_field(lw: Client, name: str):
    lw.create_model(name, ["a", "b"])
    with pytest.raises(Conflict) as e:
        lw.create_model(name, ["a", "b"], ridge=1.0)
    assert e.value.status == 409 and e.value.pointer == "/ridge"


def test_invalid_input_carries_pointer_and_reason(lw: Client, name: str):
    lw.create_model(name, ["a", "b"])
    with pytest.raises(InvalidInput) as e:
        lw.observe_batch(name, [([1.0, 2.0], 3.0), ([1.0, float("nan")], 3.0)])
    assert e.value.status == 422 and e.value.pointer == "/observations/1/x/1" and "finite" in e.value.reason
    with pytest.raises(InvalidInput) as e:
        lw.observe(name, {"a": 1.0, "c": 2.0}, 1.0)
    assert {p.pointer for p in e.value.errors} >= {"/x/c"}
    assert lw.model(name).n == 0  # a rejected request changes nothing


def test_bad_request_from_malformed_json(live_server, lw: Client, name: str):
    lw.create_model(name, ["a"])
    raw = lw._http.post(f"/v1/models/{name}/observations", content=b'{"x": [1', headers={"Content-Type": "application/json"})
    problem = Client._problem(raw)
    assert isinstance(problem, BadRequest) and problem.slug == "malformed-json" and problem.status == 400


def test_payload_too_large(server_factory):
    server = server_factory(env={"LEASTWISE_MAX_BODY_BYTES": "2048"})
    with Client(server.url, trust_env=False) as lw:
        lw.create_model("big", ["a", "b"])
        with pytest.raises(PayloadTooLarge) as e:
            lw.observe_batch("big", [([float(i), 1.0], 2.0) for i in range(200)])
        assert e.value.status == 413


def test_unreachable_names_the_url():
    with Client("http://127.0.0.1:9", retries=1, backoff=0.01, trust_env=False) as lw:
        with pytest.raises(Unreachable) as e:
            lw.list_models()
    assert e.value.url == "http://127.0.0.1:9" and isinstance(e.value, LeastwiseError)


def _problem(status: int, slug: str, **extra) -> httpx.Response:
    body = {"type": BASE + slug, "title": slug, "status": status, "detail": f"{slug} detail", **extra}
    return httpx.Response(status, content=json.dumps(body).encode(),
                          headers={"content-type": "application/problem+json", **extra.pop("_headers", {})})


@pytest.mark.parametrize("status, slug, cls", [
    (400, "malformed-json", BadRequest), (401, "unauthorized", Unauthorized), (403, "forbidden", Forbidden),
    (404, "not-found", NotFound), (408, "request-timeout", RequestTimeout), (409, "conflict", Conflict), (409, "busy", Busy),
    (413, "content-too-large", PayloadTooLarge), (422, "invalid-input", InvalidInput),
    (429, "too-many-requests", TooManyRequests), (500, "internal-error", ServerError),
    (503, "database-unavailable", ServiceUnavailable),
    (401, "some-future-token-problem", Unauthorized), (418, "teapot", Problem),
])
def test_mapping_of_each_problem_type(status, slug, cls):
    body = {"type": BASE + slug, "title": "T", "status": status, "detail": "D",
            "errors": [{"pointer": "/x/0", "reason": "must be a number"}]}
    p = problem_from_response(status, {"Retry-After": "2"}, body)
    assert type(p) is cls and p.status == status and p.slug == slug and p.title == "T" and p.detail == "D"
    assert p.pointer == "/x/0" and p.reason == "must be a number" and p.retry_after == 2.0


def test_not_json_error_answer():
    p = problem_from_response(502, {}, None, "<html>bad gateway</html>")
    assert isinstance(p, ServerError) and p.status == 502 and "bad gateway" in p.detail


def _mock(handler) -> Client:
    return Client("http://leastwise.test", transport=httpx.MockTransport(handler), retries=2, backoff=0.0)


def test_token_is_sent_as_bearer_and_401_maps():
    seen = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request.headers.get("authorization"))
        return httpx.Response(401, json={"type": BASE + "unauthorized", "title": "Unauthorized", "status": 401,
                                         "detail": "unknown token"})

    lw = Client("http://leastwise.test", token="s3cret", transport=httpx.MockTransport(handler))
    with pytest.raises(Unauthorized) as e:
        lw.list_models()
    assert seen == ["Bearer s3cret"] and e.value.detail == "unknown token"


def test_retries_answers_that_applied_nothing_then_gives_up():
    calls = []

    def handler(request: httpx.Request) -> httpx.Response:
        calls.append(json.loads(request.content))
        if len(calls) < 3:
            return httpx.Response(503, headers={"Retry-After": "0"},
                                  json={"type": BASE + "database-unavailable", "title": "Service unavailable",
                                        "status": 503, "detail": "retry later"})
        return httpx.Response(200, json={"results": [{"status": "applied", "seq": 1}], "applied": 1, "duplicates": 0,
                                         "version": 2, "n": 1, "identifiable": False, "coefficients": {}, "sigma": None})

    answer = _mock(handler).observe("m", [1.0], 2.0)
    assert answer.applied == 1 and len(calls) == 3
    assert len({c["key"] for c in calls}) == 1  # every attempt carried the same idempotency key

    def always_busy(request: httpx.Request) -> httpx.Response:
        return httpx.Response(409, json={"type": BASE + "busy", "title": "Model busy", "status": 409, "detail": "retry"})

    with pytest.raises(Busy):
        _mock(always_busy).observe("m", [1.0], 2.0)


def test_snapshot_is_not_resent_after_a_dropped_answer():
    calls = []

    def handler(request: httpx.Request) -> httpx.Response:
        calls.append(request.url.path)
        raise httpx.ReadError("connection reset", request=request)

    with pytest.raises(Unreachable):
        _mock(handler).snapshot("m", "x")
    assert len(calls) == 1  # not idempotent: sent once
    calls.clear()
    with pytest.raises(Unreachable):
        _mock(handler).model("m")
    assert len(calls) == 3  # a read is retried
