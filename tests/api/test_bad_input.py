"""Every class of bad input: a 4xx problem+json naming the field, and nothing changes."""

from __future__ import annotations

import orjson
import pytest
from sqlalchemy import text

from .conftest import assert_problem

OBS = "/v1/models/chiller-1/observations"
PRED = "/v1/models/chiller-1/predict"


def _fingerprint(client):
    store = client.app.state.registry.store
    with store.read() as conn:
        counts = tuple(conn.execute(text(f"SELECT count(*) FROM {t}")).scalar_one()
                       for t in ("models", "observations", "checkpoints", "snapshots", "idempotency_keys"))
    state = client.get("/v1/models/chiller-1").json()
    return counts, state["version"], state["n"], state["coefficients"], client.app.state.registry.live_state("chiller-1").to_bytes()


@pytest.fixture
def seeded(client, model):
    client.post(OBS, json={"observations": [{"x": [i, i * i % 7], "y": 2 * i + 1, "key": f"s{i}"} for i in range(6)]})
    return client


def _raw(body: str | bytes) -> dict:
    return {"content": body if isinstance(body, bytes) else body.encode(), "headers": {"content-type": "application/json"}}


BAD_OBSERVATIONS = [
    # (id, raw body, expected status, pointer expected in errors (None: any))
    ("nan-literal", '{"x": [1, NaN], "y": 1}', 422, "/x/1"),
    ("infinity-literal", '{"x": [1, 2], "y": Infinity}', 422, "/y"),
    ("minus-infinity", '{"x": [-Infinity, 2], "y": 1}', 422, "/x/0"),
    ("overflow-1e400", '{"x": [1, 1e400], "y": 1}', 422, "/x/1"),
    ("too-large-1e101", '{"x": [1, 1e101], "y": 1}', 422, "/x/1"),
    ("huge-integer", '{"x": [1, 2], "y": 1' + "0" * 400 + "}", 422, "/y"),
    ("row-norm", '{"x": [9e99, 9e99], "y": 1}', 422, "/x"),
    ("wrong-dimension-short", '{"x": [1], "y": 1}', 422, "/x"),
    ("wrong-dimension-long", '{"x": [1, 2, 3], "y": 1}', 422, "/x"),
    ("unknown-feature", '{"x": {"load_kw": 1, "condenser_c": 2, "humidity": 3}, "y": 1}', 422, "/x/humidity"),
    ("missing-feature", '{"x": {"load_kw": 1}, "y": 1}', 422, "/x"),
    ("string-value", '{"x": [1, "2"], "y": 1}', 422, "/x/1"),
    ("boolean-value", '{"x": [1, true], "y": 1}', 422, "/x/1"),
    ("boolean-y", '{"x": [1, 2], "y": false}', 422, "/y"),
    ("null-y", '{"x": [1, 2], "y": null}', 422, "/y"),
    ("missing-y", '{"x": [1, 2]}', 422, "/y"),
    ("missing-x", '{"y": 2}', 422, "/x"),
    ("x-not-list", '{"x": 3, "y": 2}', 422, "/x"),
    ("unknown-field", '{"x": [1, 2], "y": 1, "weight": 3}', 422, "/weight"),
    ("not-object", "[1, 2, 3]", 422, None),
    ("empty-batch", '{"observations": []}', 422, "/observations"),
    ("batch-not-list", '{"observations": {"x": [1, 2], "y": 1}}', 422, "/observations"),
    ("batch-over-limit", orjson.dumps({"observations": [{"x": [1, 2], "y": 1}] * 51}).decode(), 422, "/observations"),
    ("batch-one-bad-row", '{"observations": [{"x": [1, 2], "y": 1}, {"x": [1, 2], "y": 1}, {"x": [1, "a"], "y": 1}]}',
     422, "/observations/2/x/1"),
    ("malformed-json", '{"x": [1, 2], "y": ', 400, ""),
    ("trailing-garbage", '{"x": [1, 2], "y": 1} x', 400, ""),
    ("empty-body", "", 400, ""),
    ("bad-time-string", '{"x": [1, 2], "y": 1, "time": "yesterday"}', 422, "/time"),
    ("time-without-offset", '{"x": [1, 2], "y": 1, "time": "2024-05-01T12:00:00"}', 422, "/time"),
    ("time-boolean", '{"x": [1, 2], "y": 1, "time": true}', 422, "/time"),
    ("time-out-of-range", '{"x": [1, 2], "y": 1, "time": 1e20}', 422, "/time"),
    ("time-bad-date", '{"x": [1, 2], "y": 1, "time": "2024-02-30T12:00:00Z"}', 422, "/time"),
    ("key-not-string", '{"x": [1, 2], "y": 1, "key": 7}', 422, "/key"),
    ("key-too-long", orjson.dumps({"x": [1, 2], "y": 1, "key": "k" * 201}).decode(), 422, "/key"),
]


@pytest.mark.parametrize("body,status,where", [b[1:] for b in BAD_OBSERVATIONS], ids=[b[0] for b in BAD_OBSERVATIONS])
def test_bad_observation_changes_nothing(seeded, body, status, where):
    before = _fingerprint(seeded)
    problem = assert_problem(seeded.post(OBS, **_raw(body)), status)
    if where is not None:
        assert any(e["pointer"] == where for e in problem.get("errors", [])), problem
        assert all(e["reason"] for e in problem.get("errors", []))
    assert _fingerprint(seeded) == before


def test_time_earlier_than_last(seeded):
    seeded.post(OBS, json={"x": [1, 2], "y": 1, "time": "2024-05-01T12:00:00Z"})
    before = _fingerprint(seeded)
    problem = assert_problem(seeded.post(OBS, json={"observations": [
        {"x": [1, 2], "y": 1, "time": "2024-05-01T12:00:01Z"},
        {"x": [1, 2], "y": 1, "time": "2024-05-01T11:00:00+00:00"}]}), 422)
    assert problem["errors"][0]["pointer"] == "/observations/1/time"
    assert _fingerprint(seeded) == before


def test_body_over_limit(seeded):
    before = _fingerprint(seeded)
    big = b'{"x": [1, 2], "y": 1, "key": "' + b"k" * (70 * 1024) + b'"}'
    assert_problem(seeded.post(OBS, **_raw(big)), 413)
    assert _fingerprint(seeded) == before


def test_multipart_refused(seeded):
    before = _fingerprint(seeded)
    assert_problem(seeded.post(OBS, content=b"--x--", headers={"content-type": "multipart/form-data; boundary=x"}), 415)
    assert _fingerprint(seeded) == before


@pytest.mark.parametrize("name", ["-lead", "has space", "a" * 129, "ümlaut", "semi;colon", ".hidden"])
def test_bad_model_names(client, name):
    problem = assert_problem(client.put(f"/v1/models/{name}", json={"features": ["a"]}))
    assert problem["errors"][0]["pointer"] == "name"
    assert client.get("/v1/models").json()["models"] == []


def test_name_of_128_chars_is_fine(client):
    assert client.put("/v1/models/" + "a" * 128, json={"features": ["a"]}).status_code == 201


BAD_CONFIGS = [
    ("forgetting-zero", {"features": ["a"], "forgetting": 0}, "/forgetting"),
    ("forgetting-above-one", {"features": ["a"], "forgetting": 1.01}, "/forgetting"),
    ("forgetting-negative", {"features": ["a"], "forgetting": -0.5}, "/forgetting"),
    ("forgetting-bool", {"features": ["a"], "forgetting": True}, "/forgetting"),
    ("ridge-negative", {"features": ["a"], "ridge": -1}, "/ridge"),
    ("ridge-string", {"features": ["a"], "ridge": "1"}, "/ridge"),
    ("no-features", {"features": []}, "/features"),
    ("features-missing", {"intercept": True}, "/features"),
    ("duplicate-features", {"features": ["a", "b", "a"]}, "/features/2"),
    ("feature-not-string", {"features": ["a", 3]}, "/features/1"),
    ("feature-empty-name", {"features": [""]}, "/features/0"),
    ("too-many-features", {"features": [f"f{i}" for i in range(129)]}, "/features"),
    ("intercept-name-clash", {"features": ["intercept"]}, "/features"),
    ("intercept-not-bool", {"features": ["a"], "intercept": 1}, "/intercept"),
    ("half-life-with-forgetting", {"features": ["a"], "forgetting": 0.9, "half_life": 60}, "/half_life"),
    ("half-life-zero", {"features": ["a"], "half_life": 0}, "/half_life"),
    ("half-life-negative", {"features": ["a"], "half_life": -5}, "/half_life"),
    ("unknown-config-field", {"features": ["a"], "lambda": 0.9}, "/lambda"),
    ("config-not-object", ["a"], ""),
]


@pytest.mark.parametrize("cfg,where", [c[1:] for c in BAD_CONFIGS], ids=[c[0] for c in BAD_CONFIGS])
def test_bad_config(client, cfg, where):
    problem = assert_problem(client.put("/v1/models/m", json=cfg), 422)
    assert any(e["pointer"] == where for e in problem["errors"]), problem
    assert client.get("/v1/models").json()["models"] == []


def test_bad_config_json(client):
    assert_problem(client.put("/v1/models/m", **_raw('{"features": ["a"], "ridge": NaN}')), 422)
    assert_problem(client.put("/v1/models/m", **_raw('{"features": ["a"]')), 400)
    assert client.get("/v1/models").json()["models"] == []


BAD_PREDICT = [
    ("missing-x", {}, "/x"),
    ("wrong-dimension", {"x": [1]}, "/x"),
    ("unknown-feature", {"x": {"load_kw": 1, "condenser_c": 2, "zz": 1}}, "/x/zz"),
    ("bool", {"x": [1, False]}, "/x/1"),
    ("level-one", {"x": [1, 2], "level": 1.0}, "/level"),
    ("level-zero", {"x": [1, 2], "level": 0}, "/level"),
    ("level-string", {"x": [1, 2], "level": "0.9"}, "/level"),
    ("empty-rows", {"rows": []}, "/rows"),
    ("rows-over-limit", {"rows": [[1, 2]] * 51}, "/rows"),
    ("bad-row", {"rows": [[1, 2], [1, None]]}, "/rows/1/1"),
    ("both", {"x": [1, 2], "rows": [[1, 2]]}, ""),
    ("unknown-field", {"x": [1, 2], "foo": 1}, "/foo"),
]


@pytest.mark.parametrize("body,where", [b[1:] for b in BAD_PREDICT], ids=[b[0] for b in BAD_PREDICT])
def test_bad_predict(seeded, body, where):
    before = _fingerprint(seeded)
    problem = assert_problem(seeded.post(PRED, json=body), 422)
    assert any(e["pointer"] == where for e in problem["errors"]), problem
    assert _fingerprint(seeded) == before


def test_predict_nan_literal(seeded):
    assert_problem(seeded.post(PRED, **_raw('{"x": [1, NaN]}')), 422)


def test_missing_model_is_404_everywhere(client):
    for method, path in [("get", "/v1/models/nope"), ("delete", "/v1/models/nope"), ("get", "/v1/models/nope/drift"),
                         ("get", "/v1/models/nope/covariance"), ("get", "/v1/models/nope/snapshots"),
                         ("post", "/v1/models/nope/reset"), ("post", "/v1/models/nope/snapshots"),
                         ("post", "/v1/models/nope/snapshots/1/restore"), ("delete", "/v1/models/nope/snapshots/1")]:
        assert_problem(client.request(method.upper(), path), 404)
    assert_problem(client.post("/v1/models/nope/observations", json={"x": [1], "y": 1}), 404)
    assert_problem(client.post("/v1/models/nope/predict", json={"x": [1]}), 404)


def test_bad_snapshot_label(seeded):
    before = _fingerprint(seeded)
    assert_problem(seeded.post("/v1/models/chiller-1/snapshots", json={"label": 5}), 422)
    assert_problem(seeded.post("/v1/models/chiller-1/snapshots", json={"name": "x"}), 422)
    assert _fingerprint(seeded) == before


def test_time_gap_beyond_the_half_life_range_forgets_the_past(client):
    # Not bad input: after ~1074 half-lives every past weight underflows to 0, so the
    # exact minimiser is that of the new observation alone (minimum norm; numpy.linalg.pinv).
    import numpy as np

    client.put("/v1/models/hl", json={"features": ["a"], "half_life": 1.0})
    client.post("/v1/models/hl/observations", json={"x": [1.0], "y": 1.0, "time": 0})
    r = client.post("/v1/models/hl/observations", json={"x": [2.0], "y": 3.0, "time": 1e6})
    assert r.status_code == 200
    state = client.get("/v1/models/hl").json()
    expected = np.linalg.pinv(np.array([[1.0, 2.0]])) @ np.array([3.0])
    got = [state["coefficients"]["intercept"], state["coefficients"]["a"]]
    assert np.allclose(got, expected, rtol=1e-12)
