"""Drift status, alarms, gate counts and the reference point survive a server restart and follow snapshot restore."""

from __future__ import annotations

import numpy as np


def _obs(X, y, lo, hi):
    return {"observations": [{"x": X[i].tolist(), "y": float(y[i])} for i in range(lo, hi)]}


def test_drift_survives_restart_and_follows_restore(server_factory):
    server = server_factory()
    rng = np.random.default_rng(11)
    n = 400
    X = np.column_stack([rng.normal(60, 10, n), rng.normal(15, 5, n)])
    y = 20 + X @ np.array([1.0, 0.5]) + rng.normal(0, 2.0, n)
    y[250:] += 0.15 * X[250:, 0]  # the load coefficient rises 15 %
    y[120] += 400.0  # one glitch, caught by the gate
    with server.client() as http:
        assert http.put("/v1/models/m", json={"features": ["load", "amb"], "drift": {"gate": 8}}).status_code == 201
        for lo in range(0, 200, 50):
            assert http.post("/v1/models/m/observations", json=_obs(X, y, lo, lo + 50)).status_code == 200
        snap = http.post("/v1/models/m/snapshots", json={"label": "healthy"}).json()["id"]
        assert http.post("/v1/models/m/drift/reference", json={"snapshot": snap}).status_code == 200
        for lo in range(200, 400, 50):
            assert http.post("/v1/models/m/observations", json=_obs(X, y, lo, lo + 50)).status_code == 200
        before = http.get("/v1/models/m/drift").json()
        events_before = http.get("/v1/models/m/drift/events").json()["events"]
    assert before["status"] == "alarm" and before["gate"]["gated_total"] == 1
    assert before["reference"]["kind"] == "snapshot" and before["reference"]["snapshot"] == snap
    assert before["coefficient_test"]["p_value"] < 1e-6

    server.kill()  # like a power cut
    server.restart()
    with server.client() as http:
        after = http.get("/v1/models/m/drift").json()
        events_after = http.get("/v1/models/m/drift/events").json()["events"]
        model = http.get("/v1/models/m").json()
        for key in ("status", "reasons", "statistics", "gate", "reference", "coefficient_test", "residuals"):
            assert after[key] == before[key], key
        assert events_after == events_before
        assert model["drift"]["status"] == "alarm" and model["drift"]["gated"] == 1

        # restore the snapshot: statistics and reference are those of the snapshot (start, no alarm)
        assert http.post(f"/v1/models/m/snapshots/{snap}/restore").status_code == 200
        restored = http.get("/v1/models/m/drift").json()
        assert restored["status"] == "ok" and restored["reference"]["kind"] == "start"
        assert restored["gate"]["gated_total"] == 1 and restored["statistics"]["n_observed"] == 199  # 200 minus the gated one
        assert http.get("/v1/models/m/drift/events").json()["events"][-1]["statistic"] == "restore"
    server.restart()
    with server.client() as http:
        again = http.get("/v1/models/m/drift").json()
        assert again["statistics"] == restored["statistics"] and again["reference"] == restored["reference"]
