"""A retry after a dropped connection applies the observation once.

A loopback proxy forwards the request, waits for the service's whole answer
(so the observation is committed), then closes the connection without
replying. The client sends the same request again with the same idempotency
key; the service answers it as a duplicate.
"""

from __future__ import annotations

import json

from leastwise_client import Client
from tests.client.dropping_proxy import DroppingProxy


def _first_n(n: int):
    state = {"left": n}

    def drop(method: str, path: str, body: bytes) -> bool:
        if method == "POST" and path.endswith("/observations") and state["left"] > 0:
            state["left"] -= 1
            return True
        return False

    return drop


def test_single_observation_applied_once(server_factory):
    server = server_factory()
    proxy = DroppingProxy(server.port, _first_n(1))
    try:
        with Client(proxy.url, retries=3, backoff=0.01, trust_env=False) as lw:
            lw.create_model("ch-7", ["load_kw", "condenser_c"])
            answer = lw.observe("ch-7", [600.0, 27.0], 131.0)
            assert len(proxy.dropped) == 1
            assert answer.result.status == "duplicate" and answer.applied == 0  # the first attempt had applied it
            assert lw.model("ch-7").n == 1
        posts = [json.loads(b) for m, p, b in proxy.requests if m == "POST"]
        assert len(posts) == 2 and posts[0]["key"] == posts[1]["key"]
    finally:
        proxy.close()


def test_stream_with_a_dropped_batch_counts_every_reading_once(server_factory):
    server = server_factory()
    drops = {"seen": 0}

    def drop_second_batch(method: str, path: str, body: bytes) -> bool:
        if method == "POST" and path.endswith("/observations"):
            drops["seen"] += 1
            return drops["seen"] == 2
        return False

    proxy = DroppingProxy(server.port, drop_second_batch)
    try:
        with Client(proxy.url, retries=3, backoff=0.01, trust_env=False) as lw:
            lw.create_model("ch-8", ["a"])
            answers = list(lw.stream("ch-8", ((float(i), 2.0 * i + 1.0) for i in range(250)), batch_size=100))
            assert [a.applied for a in answers] == [100, 0, 50] and answers[1].duplicates == 100
            assert lw.model("ch-8").n == 250
    finally:
        proxy.close()
