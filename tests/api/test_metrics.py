"""GET /v1/metrics: Prometheus text exposition, read back with prometheus_client's own parser."""

from __future__ import annotations

from prometheus_client.parser import text_string_to_metric_families

from .conftest import assert_problem


def scrape(client) -> dict[tuple[str, tuple], float]:
    r = client.get("/v1/metrics")
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain")
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(r.text) for s in family.samples}


def test_counts_follow_what_was_posted(client, model):
    for i in range(6):
        r = client.post(f"/v1/models/{model}/observations", json={"x": [float(i), 1.0 + i * i], "y": 2.0 * i,
                                                                  "key": f"gw-1:{i}"})
        assert r.status_code == 200, r.text
    again = client.post(f"/v1/models/{model}/observations", json={"x": [0.0, 1.0], "y": 0.0, "key": "gw-1:0"})
    assert again.json()["duplicates"] == 1
    batch = client.post(f"/v1/models/{model}/observations",
                        json={"observations": [{"x": [7.0, 50.0], "y": 14.0}, {"x": [8.0, 65.0], "y": 16.0}]})
    assert batch.status_code == 200
    bad = client.post(f"/v1/models/{model}/observations", json={"x": [1.0], "y": 1.0})  # one feature short
    assert_problem(bad, 422)
    client.get(f"/v1/models/{model}")

    m = scrape(client)
    assert m[("leastwise_observations_total", (("status", "applied"),))] == 8
    assert m[("leastwise_observations_total", (("status", "duplicate"),))] == 1
    assert m[("leastwise_http_responses_total", (("code", "200"), ("method", "POST")))] == 8
    assert m[("leastwise_http_responses_total", (("code", "422"), ("method", "POST")))] == 1
    assert m[("leastwise_http_responses_total", (("code", "201"), ("method", "PUT")))] == 1
    # the observation route's durations: one per request, the refused one included
    assert m[("leastwise_http_request_duration_seconds_count", (("route", "observations"),))] == 9
    assert m[("leastwise_http_request_duration_seconds_count", (("route", "model"),))] == 1
    # every accepted request went through the group writer, one transaction per group
    groups = m[("leastwise_write_groups_total", ())]
    assert 1 <= groups <= 8
    assert m[("leastwise_write_group_size_count", ())] == groups
    assert m[("leastwise_write_group_size_sum", ())] == 8
    assert m[("leastwise_write_group_size_bucket", (("le", "+Inf"),))] == groups
    assert m[("leastwise_write_group_duration_seconds_count", ())] == groups
    # the writer thread's CPU time lies within the groups' durations (one thread cannot use more)
    assert 0 < m[("leastwise_write_cpu_seconds_total", ())] <= m[("leastwise_write_group_duration_seconds_sum", ())] + 1e-3
    assert m[("leastwise_write_group_failures_total", ())] == 0
    assert m[("leastwise_models_loaded", ())] == 1
    assert m[("leastwise_models_drift", (("status", "ok"),))] == 1
    assert m[("leastwise_build_info", (("database", "sqlite"), ("version", client.app.version)))] == 1


def test_a_fresh_service_exposes_every_series_at_zero(client):
    m = scrape(client)
    assert m[("leastwise_write_groups_total", ())] == 0
    assert m[("leastwise_write_group_size_bucket", (("le", "1"),))] == 0
    assert m[("leastwise_write_group_duration_seconds_bucket", (("le", "+Inf"),))] == 0
    assert m[("leastwise_write_cpu_seconds_total", ())] == 0
    assert m[("leastwise_models_loaded", ())] == 0
    assert {k for k in m if k[0] == "leastwise_models_drift"} == {
        ("leastwise_models_drift", (("status", s),)) for s in ("ok", "watch", "alarm")}


def test_histogram_buckets_are_cumulative(client, model):
    for i in range(5):
        client.post(f"/v1/models/{model}/observations", json={"x": [float(i), 2.0], "y": 1.0})
    m = scrape(client)
    for name in ("leastwise_write_group_size_bucket", "leastwise_write_group_duration_seconds_bucket"):
        rows = sorted(((float(dict(k[1])["le"]), v) for k, v in m.items() if k[0] == name))
        counts = [v for _, v in rows]
        assert counts == sorted(counts) and counts[-1] == m[(name.replace("_bucket", "_count"), ())]
