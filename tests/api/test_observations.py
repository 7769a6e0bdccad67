"""Observations (single, batch, by name), idempotency keys, predict, covariance, drift, reset, snapshots."""

from __future__ import annotations

import numpy as np

from .conftest import assert_problem


def _data(n: int = 30, seed: int = 3):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2)) * [10, 3] + [50, 20]
    y = 2.0 + X @ [0.7, -1.3] + rng.normal(scale=0.5, size=n)
    return X, y


def test_single_and_batch_match_lstsq(client, model):
    X, y = _data()
    for i in range(10):
        r = client.post(f"/v1/models/{model}/observations", json={"x": X[i].tolist(), "y": y[i]})
        assert r.status_code == 200, r.text
        res = r.json()["results"][0]
        assert res["status"] == "applied" and res["seq"] == i + 1
    batch = [{"x": {"condenser_c": X[i, 1], "load_kw": X[i, 0]}, "y": y[i]} for i in range(10, 30)]
    r = client.post(f"/v1/models/{model}/observations", json={"observations": batch})
    body = r.json()
    assert body["applied"] == 20 and body["n"] == 30 and len(body["results"]) == 20
    A = np.column_stack([np.ones(30), X])
    w = np.linalg.lstsq(A, y, rcond=None)[0]
    got = body["coefficients"]
    np.testing.assert_allclose([got["intercept"], got["load_kw"], got["condenser_c"]], w, rtol=1e-10)
    state = client.get(f"/v1/models/{model}").json()
    assert state["n"] == 30 and state["identifiable"] is True and state["sigma"] > 0
    res = body["results"][-1]
    for key in ("prediction", "residual", "standardized_residual", "recursive_residual"):
        assert isinstance(res[key], float)


def test_keys_within_and_across_batches(client, model):
    url = f"/v1/models/{model}/observations"
    r = client.post(url, json={"x": [1, 2], "y": 1, "key": "g:1"}).json()
    assert r["results"][0]["status"] == "applied"
    r = client.post(url, json={"x": [1, 2], "y": 1, "key": "g:1"}).json()
    assert r["results"][0]["status"] == "duplicate" and r["applied"] == 0 and r["n"] == 1
    r = client.post(url, json={"observations": [
        {"x": [2, 3], "y": 2, "key": "g:2"}, {"x": [2, 3], "y": 2, "key": "g:2"}, {"x": [1, 2], "y": 1, "key": "g:1"},
        {"x": [3, 1], "y": 5},
    ]}).json()
    assert [x["status"] for x in r["results"]] == ["applied", "duplicate", "duplicate", "applied"]
    assert r["n"] == 3 and r["duplicates"] == 2


def test_predict_single_and_rows(client, model):
    X, y = _data()
    client.post(f"/v1/models/{model}/observations",
                json={"observations": [{"x": X[i].tolist(), "y": y[i]} for i in range(30)]})
    one = client.post(f"/v1/models/{model}/predict", json={"x": [50, 20]}).json()
    assert one["lower"] < one["mean"] < one["upper"] and one["level"] == 0.95
    many = client.post(f"/v1/models/{model}/predict",
                       json={"rows": [[50, 20], {"load_kw": 60, "condenser_c": 18}], "level": 0.5}).json()
    assert len(many["predictions"]) == 2 and many["level"] == 0.5
    assert many["predictions"][0]["mean"] == one["mean"]
    w90 = client.post(f"/v1/models/{model}/predict", json={"x": [50, 20], "level": 0.9}).json()
    assert w90["upper"] - w90["lower"] < one["upper"] - one["lower"]


def test_covariance(client, model):
    X, y = _data()
    client.post(f"/v1/models/{model}/observations",
                json={"observations": [{"x": X[i].tolist(), "y": y[i]} for i in range(30)]})
    c = client.get(f"/v1/models/{model}/covariance").json()
    A = np.column_stack([np.ones(30), X])
    np.testing.assert_allclose(np.array(c["inverse_moment"]), np.linalg.inv(A.T @ A), rtol=1e-8)
    np.testing.assert_allclose(np.array(c["covariance"]), c["sigma"] ** 2 * np.array(c["inverse_moment"]), rtol=1e-12)
    assert c["terms"] == ["intercept", "load_kw", "condenser_c"]


def test_drift_summary_is_real(client, model):
    X, y = _data()
    r = client.post(f"/v1/models/{model}/observations",
                    json={"observations": [{"x": X[i].tolist(), "y": y[i]} for i in range(30)]}).json()
    z = [res["standardized_residual"] for res in r["results"] if res["standardized_residual"] is not None]
    d = client.get(f"/v1/models/{model}/drift").json()
    s = d["residuals"]
    assert s["count"] == len(z) > 20
    assert s["last_standardized"] == z[-1]
    np.testing.assert_allclose(s["mean_standardized"], np.mean(z), rtol=1e-12)
    np.testing.assert_allclose(s["rms_standardized"], np.sqrt(np.mean(np.square(z))), rtol=1e-12)
    assert s["max_abs_standardized"] == max(abs(v) for v in z)
    assert d["status"] in ("ok", "watch", "alarm")


def test_reset_and_snapshots(client, model):
    url = f"/v1/models/{model}"
    X, y = _data()
    client.post(f"{url}/observations", json={"observations": [{"x": X[i].tolist(), "y": y[i]} for i in range(20)]})
    before = client.get(url).json()
    snap = client.post(f"{url}/snapshots", json={"label": "commissioning"})
    assert snap.status_code == 201
    sid = snap.json()["id"]
    assert client.post(f"{url}/snapshots").status_code == 201  # label optional, body optional
    listed = client.get(f"{url}/snapshots").json()["snapshots"]
    assert [s["label"] for s in listed] == ["commissioning", None] and listed[0]["n"] == 20
    r = client.post(f"{url}/reset")
    assert r.status_code == 200 and r.json()["n"] == 0
    after_reset = client.get(url).json()
    assert after_reset["n"] == 0 and after_reset["config"] == before["config"]
    r = client.post(f"{url}/snapshots/{sid}/restore")
    assert r.status_code == 200
    restored = client.get(url).json()
    assert restored["coefficients"] == before["coefficients"] and restored["n"] == 20
    assert client.delete(f"{url}/snapshots/{sid}").status_code == 204
    assert_problem(client.delete(f"{url}/snapshots/{sid}"), 404)
    assert_problem(client.post(f"{url}/snapshots/{sid}/restore"), 404)
    assert_problem(client.post(f"{url}/snapshots/abc/restore"), 404)
    assert len(client.get(f"{url}/snapshots").json()["snapshots"]) == 1


def test_half_life_stamps_receive_time(client):
    client.put("/v1/models/hl", json={"features": ["a"], "half_life": 3600e6})
    r = client.post("/v1/models/hl/observations", json={"x": [1.0], "y": 2.0}).json()
    assert isinstance(r["results"][0]["time"], float)
    r2 = client.post("/v1/models/hl/observations", json={"x": [2.0], "y": 3.0, "time": "2999-01-01T00:00:00Z"}).json()
    assert r2["results"][0]["time"] == 32472144000.0
    # no time now: stamped no earlier than the last observation's time
    r3 = client.post("/v1/models/hl/observations", json={"x": [3.0], "y": 4.0}).json()
    assert r3["results"][0]["time"] == 32472144000.0
