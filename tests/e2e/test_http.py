"""End to end against a real ``leastwise serve`` process: NIST StRD, weighted ridge exactness, both backends."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from leastwise.engine import Spec, State

from .helpers import coefficients, lre_min, weighted_ridge_solve

# NIST StRD, Linear Least Squares Regression, <dataset>, certified values
# (Longley, Filip, Pontius, NoInt1, Wampler1-5; X holds every regressor column).
DATA = json.loads((Path(__file__).resolve().parent.parent / "data" / "nist_strd_linear.json").read_text())["datasets"]


@pytest.fixture
def server(server_factory, database_url):
    return server_factory(database_url)


def test_nist_strd_one_post_per_observation(server):
    figures = {}
    with server.client() as http:
        for name, ds in DATA.items():
            X, y = np.asarray(ds["X"], dtype=float), np.asarray(ds["y"], dtype=float)
            terms = [f"c{j}" for j in range(X.shape[1])]
            assert http.put(f"/v1/models/{name}", json={"features": terms, "intercept": False}).status_code == 201
            for xi, yi in zip(X, y):
                r = http.post(f"/v1/models/{name}/observations", json={"x": xi.tolist(), "y": float(yi)})
                assert r.status_code == 200, r.text
            body = http.get(f"/v1/models/{name}").json()
            got = coefficients(body, terms)
            engine = State(Spec(dim=X.shape[1]))
            for xi, yi in zip(X, y):
                engine.update(xi, float(yi))
            http_lre = lre_min(got, ds["certified"])
            engine_lre = lre_min(engine.coefficients(), ds["certified"])
            figures[name] = (round(http_lre, 2), round(engine_lre, 2))
            assert http_lre == engine_lre, (name, http_lre, engine_lre)
            np.testing.assert_array_equal(got, engine.coefficients())
    print("NIST LRE through HTTP (http, engine):", figures)
    assert figures["Wampler5"][0] > 5.5 and figures["Filip"][0] > 6.5
    assert min(v[0] for k, v in figures.items() if k not in ("Wampler5", "Filip", "Wampler4")) > 7.5


def _stream(http, name: str, X, y, times=None) -> dict:
    body = None
    for i in range(len(y)):
        obs = {"x": X[i].tolist(), "y": float(y[i])}
        if times is not None:
            obs["time"] = float(times[i])
        r = http.post(f"/v1/models/{name}/observations", json=obs)
        assert r.status_code == 200, r.text
        body = r.json()
    return body


def test_weighted_ridge_forgetting_and_half_life(server):
    rng = np.random.default_rng(42)
    n = 120
    X = rng.normal(size=(n, 3)) * [5.0, 1.0, 20.0] + [10.0, 0.0, 100.0]
    y = 3.0 + X @ [0.5, -2.0, 0.05] + rng.normal(scale=0.3, size=n)
    A = np.column_stack([np.ones(n), X])
    terms = ["intercept", "a", "b", "c"]
    with server.client() as http:
        lam, ridge = 0.95, 2.5
        http.put("/v1/models/lam", json={"features": ["a", "b", "c"], "forgetting": lam, "ridge": ridge})
        got = coefficients(_stream(http, "lam", X, y), terms)
        b = lam ** (n - 1 - np.arange(n))
        want = weighted_ridge_solve(A, y, b, lam**n, ridge)
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=0)

        h = 30.0
        times = 1.7e9 + np.cumsum(rng.uniform(0.5, 10.0, size=n))
        http.put("/v1/models/hl", json={"features": ["a", "b", "c"], "half_life": h, "ridge": ridge})
        got = coefficients(_stream(http, "hl", X, y, times), terms)
        b = 2.0 ** (-(times[-1] - times) / h)
        b0 = 2.0 ** (-(times[-1] - times[0]) / h)
        want = weighted_ridge_solve(A, y, b, b0, ridge)
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=0)

        # RFC 3339 times give the same answer as epoch seconds
        from datetime import datetime, timezone

        http.put("/v1/models/hl3339", json={"features": ["a", "b", "c"], "half_life": h, "ridge": ridge})
        for i in range(n):
            stamp = datetime.fromtimestamp(times[i], tz=timezone.utc).isoformat()
            r = http.post("/v1/models/hl3339/observations", json={"x": X[i].tolist(), "y": float(y[i]), "time": stamp})
        np.testing.assert_allclose(coefficients(r.json(), terms), want, rtol=1e-6)  # RFC 3339 keeps microseconds only


def test_restart_keeps_state(server):
    with server.client() as http:
        http.put("/v1/models/m", json={"features": ["a"]})
        for i in range(30):
            http.post("/v1/models/m/observations", json={"x": [float(i)], "y": 2.0 * i + (i % 3), "key": f"k{i}"})
        before = http.get("/v1/models/m").json()
    server.restart(kill=True)
    with server.client() as http:
        after = http.get("/v1/models/m").json()
        assert after == before
        r = http.post("/v1/models/m/observations", json={"x": [1.0], "y": 1.0, "key": "k3"}).json()
        assert r["results"][0]["status"] == "duplicate"
