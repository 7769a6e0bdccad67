"""GET /v1/metrics from a real ``leastwise serve`` on loopback while gateways post concurrently."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
from prometheus_client.parser import text_string_to_metric_families


def _scrape(http) -> dict[tuple[str, tuple], float]:
    r = http.get("/v1/metrics")
    assert r.status_code == 200, r.text
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(r.text) for s in family.samples}


def _serve_models(server_factory, prefix: str, features: list[str], count: int):
    server = server_factory()
    with server.client() as http:
        for m in range(count):
            assert http.put(f"/v1/models/{prefix}-{m}", json={"features": features}).status_code == 201
    return server


def test_concurrent_posts_are_counted_once_each_and_share_groups(server_factory):
    models, per_model = 4, 40
    server = _serve_models(server_factory, "boiler", ["steam_t_h", "feedwater_c"], models)

    def gateway(m: int) -> int:
        ok = 0
        with server.client() as http:
            for i in range(per_model):
                r = http.post(f"/v1/models/boiler-{m}/observations",
                              json={"x": [1.0 + i % 7, 20.0 + (i * 3) % 11], "y": 0.5 * i, "key": f"gw-{m}:{i}"})
                ok += r.status_code == 200
            r = http.post(f"/v1/models/boiler-{m}/observations", json={"x": [1.0, 20.0], "y": 0.0, "key": f"gw-{m}:0"})
            ok += r.status_code == 200 and r.json()["duplicates"] == 1
        return ok

    with ThreadPoolExecutor(8) as pool:
        answered = sum(pool.map(gateway, [m for m in range(models) for _ in range(2)]))  # two gateways per model
    posts = 2 * models * (per_model + 1)
    assert answered == posts
    with server.client() as http:
        m = _scrape(http)
    # each key was posted by two gateways: applied once, the other time a duplicate
    assert m[("leastwise_observations_total", (("status", "applied"),))] == models * per_model
    assert m[("leastwise_observations_total", (("status", "duplicate"),))] == models * (per_model + 2)
    assert m[("leastwise_http_responses_total", (("code", "200"), ("method", "POST")))] == posts
    groups = m[("leastwise_write_groups_total", ())]
    assert m[("leastwise_write_group_size_sum", ())] == posts  # every request in exactly one group
    assert m[("leastwise_write_group_size_count", ())] == groups
    assert m[("leastwise_models_loaded", ())] == models
    assert m[("process_resident_memory_bytes", ())] > 0  # prometheus_client's process collector


def test_minimal_answers_under_concurrent_gateways(server_factory):
    """``Prefer: return=minimal`` on the grouped path of a real server; the model is still the exact fit."""

    models, per_model = 3, 30
    server = _serve_models(server_factory, "kiln", ["fuel_kg_h", "feed_t_h"], models)

    def row(m: int, i: int) -> dict:
        return {"x": [100.0 + (i * 7) % 13, 20.0 + (i * 5) % 9 + m], "y": 3.0 + 0.5 * i + m, "key": f"gw-{m}:{i}"}

    def gateway(m: int) -> list[dict]:
        with server.client() as http:
            return [http.post(f"/v1/models/kiln-{m}/observations", json=row(m, i),
                              headers={"Prefer": "return=minimal"}) for i in range(per_model)]

    with ThreadPoolExecutor(6) as pool:
        answers = [r for rs in pool.map(gateway, [m for m in range(models) for _ in range(2)]) for r in rs]
    assert all(r.status_code == 200 and r.headers["preference-applied"] == "return=minimal" for r in answers)
    assert not any("coefficients" in r.json() for r in answers)
    with server.client() as http:
        for m in range(models):
            body = http.get(f"/v1/models/kiln-{m}").json()
            assert body["n"] == per_model  # the second gateway's posts were duplicates
            X = np.array([[1.0, *row(m, i)["x"]] for i in range(per_model)])  # the default intercept first
            y = np.array([row(m, i)["y"] for i in range(per_model)])
            ref = np.linalg.lstsq(X, y, rcond=None)[0]  # reference: numpy's least-squares solver
            got = [body["coefficients"][k] for k in ("intercept", "fuel_kg_h", "feed_t_h")]
            np.testing.assert_allclose(got, ref, rtol=1e-9)
