"""SIGKILL while clients post keyed observations; two servers on one PostgreSQL database."""

from __future__ import annotations

import threading
import time

import httpx
import numpy as np

from .helpers import coefficients

TERMS = ["intercept", "a", "b"]


def _data(n: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2)) * [3.0, 8.0]
    y = 1.5 + X @ [2.0, -0.25] + rng.normal(scale=0.2, size=n)
    return X, y


def _obs(X, y, i: int) -> dict:
    return {"x": X[i].tolist(), "y": float(y[i]), "key": f"gw{i % 4}:{i:06d}"}


def _batch_solution(X, y) -> np.ndarray:
    return np.linalg.lstsq(np.column_stack([np.ones(len(y)), X]), y, rcond=None)[0]


def _posters(urls: list[str], X, y, stop: threading.Event, acked: list[set], threads: int = 4) -> list[threading.Thread]:
    n = len(y)

    def run(k: int) -> None:
        with httpx.Client(base_url=urls[k % len(urls)], timeout=5.0, trust_env=False) as http:
            for i in range(k, n, threads):
                if stop.is_set():
                    return
                try:
                    r = http.post("/v1/models/m/observations", json=_obs(X, y, i))
                except httpx.HTTPError:
                    return
                if r.status_code == 200:
                    acked[k].add(i)

    return [threading.Thread(target=run, args=(k,), daemon=True) for k in range(threads)]


def test_sigkill_while_posting(server_factory, database_url):
    server = server_factory(database_url, args=["--checkpoint-every", "25"])
    X, y = _data(4000)
    with server.client() as http:
        assert http.put("/v1/models/m", json={"features": ["a", "b"]}).status_code == 201
    stop = threading.Event()
    acked: list[set] = [set() for _ in range(4)]
    threads = _posters([server.url], X, y, stop, acked)
    for t in threads:
        t.start()
    deadline = time.monotonic() + 20
    while sum(len(a) for a in acked) < 300 and time.monotonic() < deadline:
        time.sleep(0.02)
    server.kill()
    stop.set()
    for t in threads:
        t.join(10)
    done = set().union(*acked)
    assert len(done) >= 300
    server.start()
    with server.client() as http:
        n_after = http.get("/v1/models/m").json()["n"]
        assert n_after >= len(done)
        # every acknowledged observation is present: its key is a duplicate now
        for i in sorted(done):
            assert http.post("/v1/models/m/observations", json=_obs(X, y, i)).json()["results"][0]["status"] == "duplicate"
        attempted = max(done) + 1
        statuses = []
        for start in range(0, attempted + 8, 200):
            batch = [_obs(X, y, i) for i in range(start, min(attempted + 8, start + 200))]
            statuses += [r["status"] for r in http.post("/v1/models/m/observations", json={"observations": batch}).json()["results"]]
        total = attempted + 8
        assert statuses.count("applied") == total - n_after
        body = http.get("/v1/models/m").json()
        assert body["n"] == total
        np.testing.assert_allclose(coefficients(body, TERMS), _batch_solution(X[:total], y[:total]), rtol=1e-9)


def test_two_servers_one_postgres_database(server_factory, postgres_url):
    a = server_factory(postgres_url, args=["--checkpoint-every", "40"])
    b = server_factory(postgres_url, args=["--checkpoint-every", "40"])
    n = 600
    X, y = _data(n, seed=7)
    with a.client() as http:
        assert http.put("/v1/models/m", json={"features": ["a", "b"]}).status_code == 201
    stop = threading.Event()
    acked: list[set] = [set() for _ in range(4)]
    threads = _posters([a.url, b.url], X, y, stop, acked)
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert sum(len(s) for s in acked) == n  # every post answered 200: no lost update, no failure
    want = _batch_solution(X, y)
    bodies = []
    for server in (a, b):
        with server.client() as http:
            body = http.get("/v1/models/m").json()
            assert body["n"] == n
            np.testing.assert_allclose(coefficients(body, TERMS), want, rtol=1e-9)
            bodies.append(body)
    assert bodies[0]["coefficients"] == bodies[1]["coefficients"]
    # a restart of one of them replays to exactly the same state
    a.restart(kill=True)
    with a.client() as http:
        assert http.get("/v1/models/m").json()["coefficients"] == bodies[1]["coefficients"]
