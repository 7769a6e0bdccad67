"""Model lifecycle endpoints: create, list, state, ETag, delete, health."""

from __future__ import annotations

from .conftest import assert_problem


def test_healthz(client):
    r = client.get("/healthz")
    assert r.status_code == 200 and r.json() == {"status": "ok"}


def test_create_same_again_and_conflict(client):
    cfg = {"features": ["a", "b"], "intercept": False, "forgetting": 0.99, "ridge": 0.5}
    r = client.put("/v1/models/m1", json=cfg)
    assert r.status_code == 201
    body = r.json()
    assert body["config"] == {"features": ["a", "b"], "intercept": False, "forgetting": 0.99, "half_life": None, "ridge": 0.5}
    assert client.put("/v1/models/m1", json=cfg).status_code == 200
    # defaults written explicitly are the same config
    assert client.put("/v1/models/m1", json={**cfg, "half_life": None}).status_code == 200
    problem = assert_problem(client.put("/v1/models/m1", json={**cfg, "ridge": 1.0}), 409)
    assert any(e["pointer"] == "/ridge" for e in problem["errors"])


def test_list_and_get(client, model):
    r = client.get("/v1/models")
    assert [m["name"] for m in r.json()["models"]] == [model]
    r = client.get(f"/v1/models/{model}")
    assert r.status_code == 200
    body = r.json()
    assert body["n"] == 0 and body["identifiable"] is False
    assert set(body["coefficients"]) == {"intercept", "load_kw", "condenser_c"}
    assert body["drift"]["status"] == "ok"
    assert body["sigma"] is None


def test_etag_and_304(client, model):
    r = client.get(f"/v1/models/{model}")
    etag = r.headers["etag"]
    r2 = client.get(f"/v1/models/{model}", headers={"If-None-Match": etag})
    assert r2.status_code == 304 and r2.headers["etag"] == etag and r2.content == b""
    client.post(f"/v1/models/{model}/observations", json={"x": [1, 2], "y": 3})
    r3 = client.get(f"/v1/models/{model}", headers={"If-None-Match": etag})
    assert r3.status_code == 200 and r3.headers["etag"] != etag
    assert client.get(f"/v1/models/{model}", headers={"If-None-Match": "*"}).status_code == 304


def test_delete_removes_everything(client, model):
    client.post(f"/v1/models/{model}/observations", json={"x": [1, 2], "y": 3, "key": "k"})
    client.post(f"/v1/models/{model}/snapshots", json={"label": "x"})
    assert client.delete(f"/v1/models/{model}").status_code == 204
    assert_problem(client.get(f"/v1/models/{model}"), 404)
    assert_problem(client.delete(f"/v1/models/{model}"), 404)
    from sqlalchemy import text

    store = client.app.state.registry.store
    with store.read() as conn:
        for table in ("models", "observations", "checkpoints", "snapshots", "idempotency_keys"):
            assert conn.execute(text(f"SELECT count(*) FROM {table}")).scalar_one() == 0, table
    # a new model of the same name starts afresh: the old key is gone
    client.put(f"/v1/models/{model}", json={"features": ["load_kw", "condenser_c"]})
    r = client.post(f"/v1/models/{model}/observations", json={"x": [1, 2], "y": 3, "key": "k"})
    assert r.json()["results"][0]["status"] == "applied"


def test_unknown_route_and_method_are_problems(client, model):
    assert_problem(client.get("/v1/nothing"), 404)
    assert_problem(client.patch(f"/v1/models/{model}", json={}), 405)
