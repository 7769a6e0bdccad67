"""Deleting a model removes everything recorded for it; limited tokens cannot tell it ever existed."""

from __future__ import annotations

from sqlalchemy import func, insert, select, text

from leastwise.store import tables as t

from tests.api.conftest import assert_problem

from .conftest import MODEL, Env

M = f"/v1/models/{MODEL}"
PER_MODEL = [t.observations, t.checkpoints, t.snapshots, t.idempotency_keys, t.drift_events, t.drift_references]


def _counts(env: Env, model_id: int) -> dict[str, int]:
    with env.access.store.read() as conn:
        return {table.name: conn.execute(select(func.count()).select_from(table)
                                         .where(table.c.model_id == model_id)).scalar_one() for table in PER_MODEL}


def _seed(env: Env) -> int:
    c, h = env.client, env.h("admin")
    assert c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0, "key": "gw:1"}, headers=h).status_code == 200
    with env.access.store.write() as conn:
        model_id = conn.execute(select(t.models.c.id).where(t.models.c.name == MODEL)).scalar_one()
        conn.execute(insert(t.drift_events).values(model_id=model_id, at=0.0, seq=1, status="alarm", statistic="cusum"))
        if not conn.execute(select(func.count()).select_from(t.drift_references)
                            .where(t.drift_references.c.model_id == model_id)).scalar_one():
            conn.execute(insert(t.drift_references).values(model_id=model_id, kind="start", seq=0, version=1, at=0.0))
    return model_id


def test_sqlite_foreign_keys_are_on(env: Env):
    with env.access.store.read() as conn:
        assert conn.execute(text("PRAGMA foreign_keys")).scalar_one() == 1


def test_delete_removes_log_checkpoints_snapshots_keys_drift(env: Env):
    model_id = _seed(env)
    before = _counts(env, model_id)
    for name in ("observations", "checkpoints", "snapshots", "idempotency_keys", "drift_events", "drift_references"):
        assert before[name] > 0, before
    assert env.client.delete(M, headers=env.h("admin")).status_code == 204
    assert _counts(env, model_id) == {table.name: 0 for table in PER_MODEL}
    assert_problem(env.client.get(M, headers=env.h("admin")), 404)
    # re-created under the same name: a fresh model, the old key is not a duplicate
    assert env.client.put(M, json={"features": ["load_kw"]}, headers=env.h("admin")).status_code == 201
    r = env.client.post(f"{M}/observations", json={"x": [1.0], "y": 1.0, "key": "gw:1"}, headers=env.h("admin"))
    assert r.json()["applied"] == 1


def test_cascade_alone_removes_dependent_rows(env: Env):
    """Even a bare DELETE of the models row leaves nothing behind (ON DELETE CASCADE with foreign keys on)."""
    model_id = _seed(env)
    with env.access.store.write() as conn:
        conn.execute(t.models.delete().where(t.models.c.id == model_id))
    assert _counts(env, model_id) == {table.name: 0 for table in PER_MODEL}


def test_limited_tokens_get_403_before_and_after_deletion(env: Env):
    c = env.client
    paths = [M, f"{M}/drift", f"{M}/snapshots", f"{M}/covariance"]
    answers = lambda: [(c.get(p, headers=env.h("gw-b")).status_code) for p in paths]  # noqa: E731
    existing = answers()
    assert c.delete(M, headers=env.h("admin")).status_code == 204
    deleted = answers()
    never = [c.get(p.replace(MODEL, "plant-a-never"), headers=env.h("gw-b")).status_code for p in paths]
    assert existing == deleted == never == [403] * len(paths)
    # the token's own models: an ordinary 404
    assert_problem(c.get("/v1/models/plant-b-1", headers=env.h("gw-b")), 404)
