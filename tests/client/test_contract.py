"""The client against a live server: every endpoint of the REST contract v1, typed answers."""

from __future__ import annotations

import math
from datetime import datetime, timezone

import numpy as np
import pytest

from leastwise_client import (
    Client, Covariance, DriftReport, ModelInfo, ModelState, NotFound, ObservationAnswer, Prediction, Reading,
    Snapshot, StateChange,
)

FEATURES = ["load_kw", "condenser_c"]


def _rows(n: int, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.uniform(150, 900, n), rng.uniform(20, 32, n)])
    y = 14.0 + 0.16 * X[:, 0] + 2.2 * X[:, 1] + rng.normal(0, 2.0, n)
    return X, y


def test_models_create_list_get_delete(lw: Client, name: str):
    info = lw.create_model(name, FEATURES, forgetting=0.999)
    assert isinstance(info, ModelInfo) and info.is_new and info.config.features == tuple(FEATURES)
    again = lw.create_model(name, {"features": FEATURES, "forgetting": 0.999})
    assert not again.is_new and again.config == info.config
    assert name in [m.name for m in lw.list_models()]
    state = lw.model(name)
    assert isinstance(state, ModelState) and state.n == 0 and state.etag
    assert state.config.terms == ("intercept", *FEATURES)
    assert state.drift.status == "ok"
    assert lw.model_if_changed(name, state.etag) is None
    lw.delete_model(name)
    with pytest.raises(NotFound):
        lw.model(name)


def test_observe_single_batch_and_stream_are_exact(lw: Client, name: str):
    lw.create_model(name, FEATURES)
    X, y = _rows(1203)
    t0 = datetime(2025, 3, 4, 6, 0, tzinfo=timezone.utc)
    one = lw.observe(name, {"load_kw": X[0, 0], "condenser_c": X[0, 1]}, y[0], time=t0)
    assert isinstance(one, ObservationAnswer) and one.applied == 1 and one.result.applied
    assert one.result.key.startswith("lw-")  # the client's idempotency key
    batch = lw.observe_batch(name, [(X[i], y[i]) for i in range(1, 3)])
    assert batch.applied == 2 and batch.n == 3
    answers = list(lw.stream(name, (Reading(X[i].tolist(), float(y[i])) for i in range(3, len(y))), batch_size=400))
    assert [a.applied for a in answers] == [400, 400, 400]
    state = lw.model(name)
    assert state.n == len(y) and state.identifiable
    A = np.column_stack([np.ones(len(y)), X])
    ref = np.linalg.lstsq(A, y, rcond=None)[0]  # batch solve of the same rows
    got = np.array([state.coefficients[t] for t in state.config.terms])
    assert np.allclose(got, ref, rtol=1e-10, atol=0)
    assert state.last_time.startswith("2025-03-04T06:00")


def test_minimal_answers_leave_the_model_out(lw: Client, name: str):
    lw.create_model(name, FEATURES)
    X, y = _rows(40)
    one = lw.observe(name, X[0].tolist(), y[0], minimal=True)
    assert one.applied == 1 and one.coefficients == {} and one.identifiable is None and one.sigma is None
    assert one.raw.keys() == {"results", "applied", "duplicates", "version", "n"}
    batch = lw.observe_batch(name, [(X[i], y[i]) for i in range(1, 10)], minimal=True)
    assert batch.applied == 9 and batch.n == 10 and batch.coefficients == {}
    streamed = list(lw.stream(name, [(X[i], y[i]) for i in range(10, 40)], batch_size=15, minimal=True))
    assert [a.applied for a in streamed] == [15, 15] and streamed[-1].n == 40
    full = lw.observe(name, X[0].tolist(), y[0])  # no key given: a new reading, answered in full
    assert full.identifiable is True and set(full.coefficients) == {"intercept", *FEATURES}


def test_stream_with_key_prefix_is_repeatable(lw: Client, name: str):
    lw.create_model(name, FEATURES)
    X, y = _rows(50)
    readings = [(X[i], y[i]) for i in range(50)]
    first = list(lw.stream(name, readings[:30], batch_size=7, key_prefix="site-a:2025-03-04"))
    assert sum(a.applied for a in first) == 30
    again = list(lw.stream(name, readings, batch_size=7, key_prefix="site-a:2025-03-04"))
    assert sum(a.duplicates for a in again) == 30 and sum(a.applied for a in again) == 20
    assert lw.model(name).n == 50


def test_predict_drift_covariance(lw: Client, name: str):
    lw.create_model(name, FEATURES)
    X, y = _rows(300)
    lw.observe_batch(name, zip(X, y))
    p = lw.predict(name, [500.0, 26.0], level=0.9)
    assert isinstance(p, Prediction) and p.level == 0.9 and p.lower < p.mean < p.upper
    assert abs(p.mean - (14.0 + 0.16 * 500 + 2.2 * 26)) < 2.0
    many = lw.predict_rows(name, [[500.0, 26.0], {"load_kw": 300.0, "condenser_c": 22.0}])
    assert len(many) == 2 and math.isclose(many[0].mean, p.mean, rel_tol=1e-12)
    d = lw.drift(name)
    assert isinstance(d, DriftReport) and d.status in ("ok", "watch", "alarm") and d.version == lw.model(name).version
    c = lw.covariance(name)
    assert isinstance(c, Covariance) and c.terms == ("intercept", *FEATURES) and len(c.covariance) == 3


def test_snapshots_restore_reset(lw: Client, name: str):
    lw.create_model(name, FEATURES)
    X, y = _rows(40)
    lw.observe_batch(name, zip(X[:20], y[:20]))
    snap = lw.snapshot(name, "after commissioning")
    assert isinstance(snap, Snapshot) and snap.n == 20 and snap.label == "after commissioning"
    lw.observe_batch(name, zip(X[20:], y[20:]))
    assert [s.id for s in lw.snapshots(name)] == [snap.id]
    back = lw.restore(name, snap.id)
    assert isinstance(back, StateChange) and back.n == 20 and back.snapshot == snap.id
    assert lw.model(name).n == 20
    reset = lw.reset(name)
    assert reset.n == 0 and lw.model(name).n == 0
    lw.delete_snapshot(name, snap.id)
    assert lw.snapshots(name) == []
    with pytest.raises(NotFound):
        lw.restore(name, snap.id)


def test_health(lw: Client):
    assert lw.health()["status"] == "ok"
