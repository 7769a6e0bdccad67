"""Each scope against each endpoint (table-driven), the scope table's coverage of the routes."""

from __future__ import annotations

import pytest

from leastwise.api.auth import ROUTE_SCOPES, classify

from tests.api.conftest import assert_problem

from .conftest import MODEL, Env

M = f"/v1/models/{MODEL}"

# (method, path, json body, scope needed, status when allowed); {sid}: the fixture's snapshot, {tid}: the read token's id
ENDPOINTS = [
    ("GET", "/v1/models", None, "read", 200),
    ("GET", M, None, "read", 200),
    ("GET", f"{M}/drift", None, "read", 200),
    ("GET", f"{M}/drift/events", None, "read", 200),
    ("GET", f"{M}/covariance", None, "read", 200),
    ("POST", f"{M}/predict", {"x": [1.5]}, "read", 200),
    ("GET", f"{M}/snapshots", None, "read", 200),
    ("POST", f"{M}/observations", {"x": [3.0], "y": 5.0}, "write", 200),
    ("PUT", "/v1/models/plant-a-2", {"features": ["a"]}, "admin", 201),
    ("PUT", M, {"features": ["other"]}, "admin", 409),  # a config change is an admin action (refused: different)
    ("DELETE", M, None, "admin", 204),
    ("POST", f"{M}/reset", None, "admin", 200),
    ("POST", f"{M}/drift/reference", None, "admin", 200),
    ("POST", f"{M}/snapshots", {"label": "x"}, "admin", 201),
    ("POST", f"{M}/snapshots/{{sid}}/restore", None, "admin", 200),
    ("DELETE", f"{M}/snapshots/{{sid}}", None, "admin", 204),
    ("POST", "/v1/tokens", {"scope": "read", "label": "dash"}, "admin", 201),
    ("GET", "/v1/tokens", None, "admin", 200),
    ("DELETE", "/v1/tokens/{tid}", None, "admin", 204),
    ("GET", "/v1/audit", None, "admin", 200),
    ("GET", "/v1/metrics", None, "read", 200),
]
RANK = {"read": 0, "write": 1, "admin": 2}


def _call(env: Env, method: str, path: str, body, label: str | None):
    path = path.format(sid=env.snapshot, tid=env.ids["read"])
    return env.client.request(method, path, json=body, headers=env.h(label))


@pytest.mark.parametrize("token", [None, "read", "write", "admin"])
@pytest.mark.parametrize("method,path,body,need,ok", ENDPOINTS, ids=[f"{e[0]} {e[1]}" for e in ENDPOINTS])
def test_scope_table(env: Env, method, path, body, need, ok, token):
    r = _call(env, method, path, body, token)
    if token is None:
        assert_problem(r, 401)
        assert r.headers["www-authenticate"].startswith("Bearer")
    elif RANK[token] < RANK[need]:
        problem = assert_problem(r, 403)
        assert need in problem["detail"]
    else:
        assert r.status_code == ok, r.text


@pytest.mark.parametrize("method,path,body,need,ok", ENDPOINTS, ids=[f"{e[0]} {e[1]}" for e in ENDPOINTS])
def test_everything_open_without_tokens(open_client, method, path, body, need, ok):
    """With no token configured (loopback), nothing asks for one."""
    c = open_client
    assert c.put(f"/v1/models/{MODEL}", json={"features": ["load_kw"]}).status_code == 201
    c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0})
    sid = c.post(f"{M}/snapshots").json()["id"]
    tid = c.app.state.access.create_token("read", "t")[0].id
    c.app.state.access.revoke_token(tid)  # revoked: still no active token
    r = c.request(method, path.format(sid=sid, tid=tid), json=body)
    assert r.status_code == ok, r.text


def test_every_v1_route_is_in_the_scope_table(env: Env):
    """A new /v1 route must be classified explicitly in api/auth.py ROUTE_SCOPES (the fallback is GET: read, else admin)."""
    table = {(r.method, r.path) for r in ROUTE_SCOPES}
    missing = []
    for route in env.client.app.routes:
        path = getattr(route, "path", "")
        if not path.startswith("/v1"):
            continue
        for method in getattr(route, "methods", ()) or ():
            if method != "HEAD" and (method, path) not in table:
                missing.append(f"{method} {path}")
    assert not missing, f"add these to ROUTE_SCOPES in service/leastwise/api/auth.py: {missing}"


def test_unlisted_routes_fall_back_safely():
    assert classify("GET", "/v1/models/x/something-new")[0].scope == "read"
    assert classify("POST", "/v1/models/x/something-new")[0].scope == "admin"
    assert classify("POST", "/v1/models/x/something-new")[1] == "x"
    assert classify("PATCH", "/v1/models/x")[0].scope == "admin"
    assert classify("GET", "/v1/whatever")[1] is None


def test_unknown_routes_need_a_token_too(env: Env):
    assert_problem(env.client.get("/v1/nothing-here"), 401)
    assert_problem(env.client.get("/v1/nothing-here", headers=env.h("read")), 404)
    assert_problem(env.client.patch(M, headers=env.h("read")), 403)
    assert_problem(env.client.patch(M, headers=env.h("admin")), 405)


def test_healthz_stays_open_and_says_nothing(env: Env):
    r = env.client.get("/healthz")
    assert r.status_code == 200 and r.json() == {"status": "ok"}
    r = env.client.get("/healthz", headers={"Authorization": "Bearer nonsense"})
    assert r.status_code == 200 and r.json() == {"status": "ok"}
