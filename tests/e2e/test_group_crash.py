"""SIGKILL while a group commit is in flight: nothing acknowledged is lost, retries apply once."""

from __future__ import annotations

import threading
import time

import numpy as np

from .helpers import coefficients
from .test_crash import TERMS, _batch_solution, _data, _obs, _posters


def test_sigkill_inside_group_commit(server_factory, sqlite_url):
    # every group transaction sleeps 30 ms between writing its rows and committing:
    # the kill lands inside an open group transaction almost surely
    server = server_factory(sqlite_url, args=["--checkpoint-every", "20"],
                            env={"LEASTWISE_DEBUG_COMMIT_DELAY": "0.03"})
    n_threads = 16
    X, y = _data(3000, seed=3)
    with server.client() as http:
        assert http.put("/v1/models/m", json={"features": ["a", "b"]}).status_code == 201
    stop = threading.Event()
    acked: list[set] = [set() for _ in range(n_threads)]
    threads = _posters([server.url], X, y, stop, acked, threads=n_threads)
    for t in threads:
        t.start()
    deadline = time.monotonic() + 20
    while sum(len(a) for a in acked) < 400 and time.monotonic() < deadline:
        time.sleep(0.01)
    time.sleep(0.013)  # off the group rhythm
    server.kill()
    stop.set()
    for t in threads:
        t.join(10)
    done = set().union(*acked)
    assert len(done) >= 400
    server.extra_env.pop("LEASTWISE_DEBUG_COMMIT_DELAY", None)
    server.start()
    with server.client() as http:
        n_after = http.get("/v1/models/m").json()["n"]
        assert n_after >= len(done)
        for start in range(0, len(y), 500):  # acknowledged ones come back as duplicates
            ids = sorted(i for i in done if start <= i < start + 500)
            if ids:
                out = http.post("/v1/models/m/observations", json={"observations": [_obs(X, y, i) for i in ids]}).json()
                assert {r["status"] for r in out["results"]} == {"duplicate"}
        attempted = max(done) + n_threads + 1
        statuses = []
        for start in range(0, attempted, 200):
            batch = [_obs(X, y, i) for i in range(start, min(attempted, start + 200))]
            statuses += [r["status"] for r in http.post("/v1/models/m/observations", json={"observations": batch}).json()["results"]]
        assert statuses.count("applied") == attempted - n_after  # each retry applied exactly once
        body = http.get("/v1/models/m").json()
        assert body["n"] == attempted
        np.testing.assert_allclose(coefficients(body, TERMS), _batch_solution(X[:attempted], y[:attempted]), rtol=1e-9)
