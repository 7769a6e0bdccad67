"""Drift through the API: statsmodels agreement, status/alarms/events, config, gate, reference, excitation."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from .conftest import assert_problem

RecursiveLS = pytest.importorskip("statsmodels.regression.recursive_ls").RecursiveLS


def _data(seed: int, n: int, shift_at: int | None = None, shift: float = 0.0):
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(60, 10, n), rng.normal(15, 5, n)])
    y = 20 + X @ np.array([1.0, 0.5]) + rng.normal(0, 2.0, n)
    if shift_at is not None:
        y[shift_at:] += shift * X[shift_at:, 0]
    return X, y


def _post(client, name, X, y, chunk=50):
    bodies = []
    for s in range(0, len(y), chunk):
        obs = [{"x": X[i].tolist(), "y": float(y[i])} for i in range(s, min(s + chunk, len(y)))]
        r = client.post(f"/v1/models/{name}/observations", json={"observations": obs})
        assert r.status_code == 200, r.text
        bodies.append(r.json())
    return bodies


def _put(client, name, **extra):
    r = client.put(f"/v1/models/{name}", json={"features": ["load_kw", "ambient_c"], **extra})
    assert r.status_code in (200, 201), r.text
    return r


def test_cusum_and_lines_equal_statsmodels_recursive_ls(client):
    X, y = _data(1, 150, shift_at=100, shift=0.03)
    _put(client, "sm")
    _post(client, "sm", X, y)
    body = client.get("/v1/models/sm/drift?history=true").json()
    Xc = np.column_stack([np.ones(len(y)), X])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = RecursiveLS(y, Xc).fit()
    d = max(res.nobs_diffuse, res.loglikelihood_burn)
    hist = body["bde_cusum"]["history"]
    assert hist["available"] and hist["m"] == res.nobs - d
    # statsmodels RecursiveLSResults.resid_recursive / .cusum / .cusum_squares, reference library
    np.testing.assert_allclose(hist["recursive_residuals"], res.resid_recursive[d:], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(hist["cusum"]["values"], res.cusum, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(hist["cusum_squares"]["values"], res.cusum_squares, rtol=1e-8, atol=1e-8)
    # statsmodels RecursiveLSResults._cusum_significance_bounds (5 % and 1 %), reference library
    pts = np.arange(d + 1, res.nobs + 1)
    for alpha, tag in ((0.05, "5pct"), (0.01, "1pct")):
        lo, hi = res._cusum_significance_bounds(alpha, points=pts)
        np.testing.assert_allclose(hist["cusum"][f"lower_{tag}"], lo, rtol=1e-8, atol=1e-8)
        np.testing.assert_allclose(hist["cusum"][f"upper_{tag}"], hi, rtol=1e-8, atol=1e-8)
    # the streaming statistic equals the batch end point; its line is the band's end point
    assert body["bde_cusum"]["value"] == pytest.approx(res.cusum[-1], rel=1e-8, abs=1e-8)
    assert body["bde_cusum"]["line_5pct"] == pytest.approx(res._cusum_significance_bounds(0.05, points=pts)[1][-1],
                                                           rel=1e-8)
    assert body["null_distributions"].startswith("exact")


def test_status_alarm_events_and_reference_move(client):
    X, y = _data(2, 400, shift_at=200, shift=0.15)
    _put(client, "m")
    bodies = _post(client, "m", X, y)
    changed = [r for b in bodies for r in b["results"] if "drift" in r]
    assert changed and changed[-1]["drift"]["status"] == "alarm"
    first_alarm = next(r for r in changed if r["drift"]["status"] == "alarm")
    assert first_alarm["seq"] > 200
    reason = first_alarm["drift"]["reasons"][0]
    assert {"statistic", "level", "value", "threshold", "since"} <= set(reason)
    assert any("drift" in b for b in bodies)  # top level when the status changed in that request
    model = client.get("/v1/models/m").json()
    assert model["drift"]["status"] == "alarm" and model["drift"]["reasons"]
    full = client.get("/v1/models/m/drift").json()
    for key in ("bde_cusum", "mean_shift", "ewma", "excitation", "coefficient_test", "gate", "settings"):
        assert key in full, key
    assert full["bde_cusum"]["a_5pct"] == 0.948 and full["bde_cusum"]["a_1pct"] == 1.143
    assert full["mean_shift"]["alarm_h_sigma"] == 25.0
    assert full["excitation"]["effective_n"] == 400.0 and full["excitation"]["condition"] > 1
    assert full["coefficient_test"]["available"] is False  # the reference is the model's start
    events = client.get("/v1/models/m/drift/events?status=alarm").json()["events"]
    assert events and events[0]["status"] == "alarm" and events[0]["seq"] == first_alarm["seq"]
    assert events[0]["statistic"] == reason["statistic"]
    # moving the reference to now clears the alarms and is recorded
    r = client.post("/v1/models/m/drift/reference", json={})
    assert r.status_code == 200, r.text
    assert r.json()["status"] == "ok" and r.json()["reference"]["kind"] == "now"
    assert client.get("/v1/models/m").json()["drift"]["status"] == "ok"
    events = client.get("/v1/models/m/drift/events").json()["events"]
    assert events[-1]["statistic"] == "reference"
    assert client.get("/v1/models/m/drift/events?status=nope").status_code == 422


def test_coefficient_test_against_a_snapshot(client):
    X, y = _data(3, 600, shift_at=300, shift=0.15)
    _put(client, "c")
    _post(client, "c", X[:300], y[:300])
    sid = client.post("/v1/models/c/snapshots", json={"label": "commissioning"}).json()["id"]
    _post(client, "c", X[300:400], y[300:400] - 0.15 * X[300:400, 0])  # no change yet
    r = client.post("/v1/models/c/drift/reference", json={"snapshot": sid})
    assert r.status_code == 200, r.text
    same = client.get("/v1/models/c/drift").json()["coefficient_test"]
    assert same["available"] and same["method"] == "wald_nested" and same["p_value"] > 0.01
    assert same["reference"]["snapshot"] == sid and "chow_predictive" in same
    _post(client, "c", X[400:], y[400:])  # the load coefficient is 15 % higher from here
    changed = client.get("/v1/models/c/drift").json()["coefficient_test"]
    assert changed["p_value"] < 1e-6 and changed["difference"]["load_kw"] > 0.05
    assert_problem(client.post("/v1/models/c/drift/reference", json={"snapshot": 999}), 404)
    assert_problem(client.post("/v1/models/c/drift/reference", json={"snapshot": "x"}), 422)
    assert_problem(client.post("/v1/models/c/drift/reference", json={"other": 1}), 422)


def test_drift_config_validated_same_again_200_different_409(client):
    cfg = {"features": ["a"], "drift": {"cusum_h_alarm": 30, "gate": 6}}
    assert client.put("/v1/models/cfg", json=cfg).status_code == 201
    assert client.put("/v1/models/cfg", json=cfg).status_code == 200
    assert client.get("/v1/models/cfg").json()["config"]["drift"] == {"cusum_h_alarm": 30.0, "gate": 6.0}
    assert_problem(client.put("/v1/models/cfg", json={**cfg, "drift": {"cusum_h_alarm": 31}}), 409)
    # defaults spelled out equal the defaults left out
    assert client.put("/v1/models/plain", json={"features": ["a"]}).status_code == 201
    assert client.put("/v1/models/plain", json={"features": ["a"], "drift": {"cusum_h_alarm": 25}}).status_code == 200
    settings = client.get("/v1/models/cfg/drift").json()["settings"]
    assert settings["cusum_h_alarm"] == 30.0 and settings["cusum_k"] == 0.25
    for bad in ({"nope": 1}, {"cusum_h_alarm": "x"}, {"cusum_h_watch": 40}, {"bde_alpha_watch": 0.2},
                {"gate": 0.5}, {"warmup": 1.5}, {"latch": 1}, {"erosion_renewal": 2}, [1]):
        body = assert_problem(client.put("/v1/models/bad", json={"features": ["a"], "drift": bad}), 422)
        assert body["errors"][0]["pointer"].startswith("/drift"), body
    assert client.get("/v1/models/bad").status_code == 404


def test_gate_logs_reports_and_does_not_apply(client):
    X, y = _data(4, 120)
    _put(client, "g", drift={"gate": 5, "gate_run": 3})
    _post(client, "g", X[:100], y[:100])
    before = client.get("/v1/models/g").json()
    r = client.post("/v1/models/g/observations", json={"x": X[100].tolist(), "y": float(y[100]) + 500})
    body = r.json()
    assert r.status_code == 200 and body["results"][0]["status"] == "gated", body
    assert body["gated"] == 1 and body["applied"] == 0
    assert body["results"][0]["standardized_residual"] > 5
    after = client.get("/v1/models/g").json()
    assert after["coefficients"] == before["coefficients"] and after["n"] == before["n"]
    assert after["drift"]["gated"] == 1 and after["drift"]["status"] == "watch"
    ok = client.post("/v1/models/g/observations", json={"x": X[101].tolist(), "y": float(y[101])}).json()
    assert ok["results"][0]["status"] == "applied" and ok["n"] == before["n"] + 1
    assert ok["drift"]["status"] == "ok"
    # a run of gated observations raises an alarm: a large persistent shift cannot hide behind the gate
    obs = [{"x": X[i].tolist(), "y": float(y[i]) + 500} for i in range(102, 106)]
    run = client.post("/v1/models/g/observations", json={"observations": obs}).json()
    assert run["gated"] == 4 and run["drift"]["status"] == "alarm"
    assert run["drift"]["reasons"][0]["statistic"] == "gated_run"
    gate = client.get("/v1/models/g/drift").json()["gate"]
    assert gate["gated_total"] == 5 and gate["threshold"] == 5.0


def test_excitation_erosion_warning_under_forgetting(client):
    rng = np.random.default_rng(5)
    _put(client, "f", forgetting=0.98)
    n = 600
    X = np.column_stack([rng.normal(60, 10, n), rng.normal(15, 5, n)])
    X[300:, 1] = 15.0  # the ambient sensor sticks: no new information along that direction
    y = 20 + X @ np.array([1.0, 0.5]) + rng.normal(0, 2.0, n)
    _post(client, "f", X[:300], y[:300])
    full = client.get("/v1/models/f/drift").json()
    assert full["excitation"]["erosion"]["eroding"] is False and full["excitation"]["warning"] is None
    assert full["approximate"] is True and full["null_distributions"].startswith("approximate")
    assert full["excitation"]["kish_effective_n"] == pytest.approx(99.0, rel=0.01)
    _post(client, "f", X[300:], y[300:])
    full = client.get("/v1/models/f/drift").json()
    ero = full["excitation"]["erosion"]
    assert ero["eroding"] is True and ero["renewal"] < 0.1, ero
    assert "eroding" in full["excitation"]["warning"]
    assert any(r["statistic"] == "excitation_erosion" for r in full["reasons"])
    assert all(r["approximate"] for r in full["reasons"] if r["statistic"] != "excitation_erosion")
