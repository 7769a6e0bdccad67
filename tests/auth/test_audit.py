"""The audit trail: every operator action (with versions), failed and refused attempts, filters, the CLI."""

from __future__ import annotations

import time

from click.testing import CliRunner

from leastwise.cli import main

from tests.api.conftest import assert_problem

from .conftest import MODEL, Env

M = f"/v1/models/{MODEL}"


def _last(env: Env, **filters) -> dict:
    entries = env.audit(limit=1, **filters)
    assert entries, filters
    return entries[0]


def test_every_operator_action_is_recorded_with_versions(env: Env):
    c, h = env.client, env.h("admin")
    version = c.get(M, headers=h).json()["version"]

    assert c.post(f"{M}/reset", headers=h).status_code == 200
    e = _last(env, action="reset")
    assert (e["model"], e["token_label"], e["outcome"], e["status"]) == (MODEL, "admin", "ok", 200)
    assert (e["version_before"], e["version_after"]) == (version, version + 1)

    sid = c.post(f"{M}/snapshots", json={"label": "s"}, headers=h).json()["id"]
    e = _last(env, action="snapshot")
    assert (e["version_before"], e["version_after"], e["status"]) == (version + 1, version + 1, 201)
    assert str(sid) in e["detail"]

    assert c.post(f"{M}/snapshots/{env.snapshot}/restore", headers=h).status_code == 200
    e = _last(env, action="restore")
    assert (e["version_before"], e["version_after"]) == (version + 1, version + 2)
    assert str(env.snapshot) in e["detail"]

    assert c.delete(f"{M}/snapshots/{sid}", headers=h).status_code == 204
    e = _last(env, action="snapshot-delete")
    assert (e["version_before"], e["version_after"], e["status"]) == (version + 2, version + 2, 204)

    assert c.put("/v1/models/plant-a-2", json={"features": ["a"]}, headers=h).status_code == 201
    e = _last(env, action="create")
    assert (e["model"], e["version_before"], e["version_after"]) == ("plant-a-2", None, 1)

    assert c.put("/v1/models/plant-a-2", json={"features": ["a"]}, headers=h).status_code == 200
    e = _last(env, action="config")
    assert (e["outcome"], e["version_before"], e["version_after"]) == ("ok", 1, 1) and "unchanged" in e["detail"]

    assert c.put("/v1/models/plant-a-2", json={"features": ["b"]}, headers=h).status_code == 409
    e = _last(env, action="config")
    assert (e["outcome"], e["status"], e["version_before"], e["version_after"]) == ("failed", 409, 1, 1)
    assert "different configuration" in e["detail"]

    assert c.delete("/v1/models/plant-a-2", headers=h).status_code == 204
    e = _last(env, action="delete")
    assert (e["model"], e["version_before"], e["version_after"]) == ("plant-a-2", 1, None)

    made = c.post("/v1/tokens", json={"scope": "read", "label": "dash"}, headers=h).json()
    e = _last(env, action="token-create")
    assert e["token_label"] == "admin" and "dash" in e["detail"] and made["token"] not in str(e)

    assert c.delete(f"/v1/tokens/{made['id']}", headers=h).status_code == 204
    e = _last(env, action="token-revoke")
    assert e["token_label"] == "admin" and "dash" in e["detail"]

    # reads and observations are not operator actions
    before = len(env.audit(limit=1000))
    c.get(M, headers=h)
    c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0}, headers=h)
    c.post(f"{M}/predict", json={"x": [1.0]}, headers=h)
    assert len(env.audit(limit=1000)) == before


def test_refused_attempts_are_recorded(env: Env):
    c = env.client
    assert_problem(c.post(f"{M}/reset", headers=env.h("write")), 403)
    e = _last(env, action="reset")
    assert (e["outcome"], e["status"], e["token_label"], e["model"]) == ("denied", 403, "write", MODEL)
    assert "admin" in e["detail"]
    assert_problem(c.delete(M, headers=env.h("gw-b")), 403)
    e = _last(env, action="delete")
    assert (e["outcome"], e["token_label"]) == ("denied", "gw-b")
    assert_problem(c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0}, headers=env.h("read")), 403)
    assert _last(env, action="observe")["outcome"] == "denied"
    assert_problem(c.post("/v1/tokens", json={"scope": "admin"}, headers=env.h("admin-a")), 403)
    assert _last(env, action="token-create")["token_label"] == "admin-a"
    # failed (not refused) operator actions are recorded too
    assert_problem(c.post("/v1/models/plant-a-gone/reset", headers=env.h("admin")), 404)
    e = _last(env, action="reset")
    assert (e["outcome"], e["status"], e["model"]) == ("failed", 404, "plant-a-gone")
    assert_problem(c.post(f"{M}/snapshots/424242/restore", headers=env.h("admin")), 404)
    e = _last(env, action="restore")
    assert e["outcome"] == "failed" and e["version_before"] is not None and e["version_after"] == e["version_before"]
    # unauthenticated requests are not (they carry no label; the request log has them)
    n = len(env.audit(limit=1000))
    assert_problem(c.post(f"{M}/reset"), 401)
    assert len(env.audit(limit=1000)) == n


def test_actions_without_tokens_are_recorded_anonymously(open_client):
    c = open_client
    assert c.put("/v1/models/m-1", json={"features": ["a"]}).status_code == 201
    e = c.app.state.access.audit(limit=1)[0]
    assert (e["action"], e["token_label"], e["detail"]) == ("create", None, "no tokens configured")


def test_audit_api_filters(env: Env):
    c, h = env.client, env.h("admin")
    t0 = time.time()
    c.post(f"{M}/reset", headers=h)
    c.post(f"{M}/reset", headers=env.h("read"))
    c.put("/v1/models/plant-a-3", json={"features": ["a"]}, headers=h)
    entries = c.get("/v1/audit", headers=h).json()["entries"]
    assert [e["action"] for e in entries[:3]] == ["create", "reset", "reset"]  # newest first
    by_model = c.get(f"/v1/audit?model={MODEL}", headers=h).json()["entries"]
    assert by_model and all(e["model"] == MODEL for e in by_model)
    denied = c.get("/v1/audit?outcome=denied", headers=h).json()["entries"]
    assert [e["token_label"] for e in denied] == ["read"]
    assert len(c.get("/v1/audit?limit=2", headers=h).json()["entries"]) == 2
    recent = c.get(f"/v1/audit?since={t0}", headers=h).json()["entries"]
    assert len(recent) == 3
    since = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t0 + 3600))
    assert c.get(f"/v1/audit?since={since}", headers=h).json()["entries"] == []
    assert c.get("/v1/audit?action=reset&outcome=ok", headers=h).json()["entries"][0]["token_label"] == "admin"
    for bad in ["limit=0", "limit=100000", "since=yesterday", "outcome=maybe"]:
        assert_problem(c.get(f"/v1/audit?{bad}", headers=h), 422)


def test_audit_cli(env: Env):
    env.client.post(f"{M}/reset", headers=env.h("admin"))
    env.client.post(f"{M}/reset", headers=env.h("write"))
    db = str(env.access.store.engine.url)
    r = CliRunner().invoke(main, ["audit", "--database", db, "--model", MODEL])
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert "denied" in lines[0] and "reset" in lines[0] and "write" in lines[0]
    assert "ok" in lines[1] and "admin" in lines[1]
    r = CliRunner().invoke(main, ["audit", "--database", db, "--json", "--outcome", "denied", "--since", "0"])
    assert r.exit_code == 0 and '"token_label":"write"' in r.stdout
    assert CliRunner().invoke(main, ["audit", "--database", db, "--since", "soon"]).exit_code != 0
