"""Tokens: storage as hashes, patterns, revocation, malformed headers, the query string, the API and the CLI."""

from __future__ import annotations

import hashlib
import re

import pytest
from click.testing import CliRunner
from sqlalchemy import select

from leastwise.cli import main
from leastwise.models.access import AccessControl, new_token, pattern_allows
from leastwise.store import Store
from leastwise.store.tables import tokens as tokens_table

from tests.api.conftest import assert_problem

from .conftest import MODEL, Env

M = f"/v1/models/{MODEL}"


def test_tokens_are_random_and_stored_only_as_hashes(env: Env):
    token = env.tokens["admin"]
    assert re.fullmatch(r"lw_[A-Za-z0-9_-]{43}", token)  # 32 random bytes = 256 bits
    assert len({new_token() for _ in range(1000)}) == 1000
    with env.access.store.read() as conn:
        rows = conn.execute(select(tokens_table)).all()
    stored = {r.digest for r in rows}
    assert hashlib.sha256(token.encode()).hexdigest() in stored
    for r in rows:
        assert all(t not in " ".join(map(str, r)) for t in env.tokens.values())
    listed = env.client.get("/v1/tokens", headers=env.h("admin")).json()["tokens"]
    assert all("token" not in t and "digest" not in t for t in listed)


@pytest.mark.parametrize("pattern,name,allowed", [
    ("plant-a-*", "plant-a-1", True), ("plant-a-*", "plant-a-", True), ("plant-a-*", "plant-b-1", False),
    ("plant-a-*", "Plant-a-1", False),  # case-sensitive
    ("plant-?", "plant-7", True), ("plant-?", "plant-17", False),
    ("line[12]-*", "line2-pump", True), ("line[12]-*", "line3-pump", False), ("line[!12]-*", "line3-pump", True),
    ("chiller-1", "chiller-1", True), ("chiller-1", "chiller-10", False),  # whole name
    (None, "anything", True),
])
def test_pattern_semantics(pattern, name, allowed):
    assert pattern_allows(pattern, name) is allowed


def test_pattern_limited_token(env: Env):
    c = env.client
    assert c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0}, headers=env.h("gw-a")).status_code == 200
    p = assert_problem(c.post(f"{M}/observations", json={"x": [1.0], "y": 1.0}, headers=env.h("gw-b")), 403)
    assert "plant-b-*" in p["detail"]
    # outside the pattern: 403 whether the model exists or not, so nothing leaks
    for name in (MODEL, "plant-a-never-made"):
        assert_problem(c.get(f"/v1/models/{name}", headers=env.h("gw-b")), 403)
    assert_problem(c.get("/v1/models/plant-b-never-made", headers=env.h("gw-b")), 404)
    # listing shows only matching models
    assert c.get("/v1/models", headers=env.h("gw-b")).json() == {"models": []}
    assert [m["name"] for m in c.get("/v1/models", headers=env.h("gw-a")).json()["models"]] == [MODEL]
    # a limited admin manages its models but not tokens or the audit trail
    assert c.put("/v1/models/plant-a-9", json={"features": ["a"]}, headers=env.h("admin-a")).status_code == 201
    assert_problem(c.put("/v1/models/plant-b-9", json={"features": ["a"]}, headers=env.h("admin-a")), 403)
    assert_problem(c.post("/v1/tokens", json={"scope": "admin"}, headers=env.h("admin-a")), 403)
    assert_problem(c.get("/v1/audit", headers=env.h("admin-a")), 403)


def test_revoked_token(env: Env):
    c = env.client
    assert c.get(M, headers=env.h("read")).status_code == 200
    assert c.delete(f"/v1/tokens/{env.ids['read']}", headers=env.h("admin")).status_code == 204
    p = assert_problem(c.get(M, headers=env.h("read")), 401)
    assert "revoked" in p["detail"]
    assert c.delete(f"/v1/tokens/{env.ids['read']}", headers=env.h("admin")).status_code == 204  # again: no-op
    assert_problem(c.delete("/v1/tokens/999999", headers=env.h("admin")), 404)
    assert_problem(c.delete("/v1/tokens/abc", headers=env.h("admin")), 404)
    listed = {t["id"]: t for t in c.get("/v1/tokens", headers=env.h("admin")).json()["tokens"]}
    assert listed[env.ids["read"]]["revoked"] is not None
    active = c.get("/v1/tokens?revoked=false", headers=env.h("admin")).json()["tokens"]
    assert env.ids["read"] not in {t["id"] for t in active}


def test_revocation_by_another_process_takes_effect(env: Env, tmp_path):
    other = AccessControl(Store.open(str(env.access.store.engine.url)))
    env.access.cache_seconds = 0.0  # no waiting in the test; the default is 1 s
    assert env.client.get(M, headers=env.h("write")).status_code == 200
    other.revoke_token(env.ids["write"])
    assert_problem(env.client.get(M, headers=env.h("write")), 401)
    other.store.close()


@pytest.mark.parametrize("header", [
    "Bearer", "Bearer ", "Basic dXNlcjpwYXNz", "Token abc", "bearer lw_not-a-real-token", "Bearer lw_x y",
    "Bearer " + "a" * 300, "Bearer l\u00e9", "lw_missing_scheme", "Bearer ,", "Bearer <script>",
])
def test_garbled_authorization_headers(env: Env, header):
    r = env.client.get(M, headers={"Authorization": header.encode("utf-8")})
    p = assert_problem(r, 401)
    assert "www-authenticate" in r.headers
    assert p["instance"] == M


def test_scheme_is_case_insensitive_and_two_headers_are_refused(env: Env):
    token = env.tokens["read"]
    assert env.client.get(M, headers={"Authorization": f"bearer {token}"}).status_code == 200
    assert env.client.get(M, headers={"Authorization": f"BEARER  {token} "}).status_code == 200
    r = env.client.get(M, headers=[("Authorization", f"Bearer {token}"), ("Authorization", f"Bearer {token}")])
    assert_problem(r, 401)


@pytest.mark.parametrize("query", ["access_token={t}", "ACCESS_TOKEN={t}", "x=1&access_token={t}", "access_token="])
def test_token_in_query_string_is_not_accepted(env: Env, open_client, query):
    q = query.format(t=env.tokens["admin"])
    p = assert_problem(env.client.get(f"/v1/models?{q}"), 400)
    assert "query string" in p["detail"]
    # not even alongside a valid header, and not when no tokens exist
    assert_problem(env.client.get(f"/v1/models?{q}", headers=env.h("admin")), 400)
    assert_problem(open_client.get(f"/v1/models?{q}"), 400)


def test_unauthenticated_large_body_is_refused_unread(env: Env):
    r = env.client.post(f"{M}/observations", content=b"[" + b"1," * 400_000 + b"1]",
                        headers={"Content-Type": "application/json"})
    assert_problem(r, 401)


def test_token_api_validates(env: Env):
    c, h = env.client, env.h("admin")
    for body in [{}, {"scope": "root"}, {"scope": "read", "models": "a/b"}, {"scope": "read", "extra": 1},
                 {"scope": "read", "label": "x" * 201}, {"scope": "read", "label": "a\nb"}, [], "read",
                 {"scope": "read", "models": ""}]:
        assert_problem(c.post("/v1/tokens", json=body, headers=h), 422)
    r = c.post("/v1/tokens", json={"scope": "write", "label": "gw-7", "models": "plant-c-*"}, headers=h)
    assert r.status_code == 201 and r.headers["cache-control"] == "no-store"
    made = r.json()
    assert (made["scope"], made["label"], made["models"]) == ("write", "gw-7", "plant-c-*")
    new = {"Authorization": f"Bearer {made['token']}"}
    assert c.put("/v1/models/plant-c-1", json={"features": ["a"]}, headers=h).status_code == 201
    assert c.post("/v1/models/plant-c-1/observations", json={"x": [1], "y": 1}, headers=new).status_code == 200
    # "*" is the same as no pattern
    star = c.post("/v1/tokens", json={"scope": "read", "models": "*"}, headers=h).json()
    assert star["models"] is None


def test_cli_token_commands(tmp_path):
    db = f"sqlite:///{tmp_path / 'cli.sqlite3'}"
    runner = CliRunner()
    r = runner.invoke(main, ["token", "create", "--database", db, "--scope", "write", "--label", "gw-1",
                             "--models", "plant-a-*"])
    assert r.exit_code == 0, r.output
    token = r.stdout.strip()
    assert re.fullmatch(r"lw_[A-Za-z0-9_-]{43}", token), r.stdout  # stdout holds only the token
    r = runner.invoke(main, ["token", "list", "--database", db])
    assert r.exit_code == 0 and "gw-1" in r.stdout and "plant-a-*" in r.stdout and token not in r.stdout
    store = Store.open(db)
    found = AccessControl(store).authenticate(token)
    assert found is not None and (found.scope, found.models, found.label) == ("write", "plant-a-*", "gw-1")
    r = runner.invoke(main, ["token", "revoke", "--database", db, str(found.id)])
    assert r.exit_code == 0 and "revoked" in r.stdout
    assert AccessControl(store).authenticate(token) is None
    r = runner.invoke(main, ["token", "list", "--database", db])
    assert "gw-1" not in r.stdout
    r = runner.invoke(main, ["token", "list", "--database", db, "--all"])
    assert "gw-1" in r.stdout
    assert runner.invoke(main, ["token", "revoke", "--database", db, "999"]).exit_code != 0
    assert runner.invoke(main, ["token", "create", "--database", db, "--scope", "root"]).exit_code != 0
    bad = runner.invoke(main, ["token", "create", "--database", db, "--scope", "read", "--models", "a b"])
    assert bad.exit_code != 0 and "glob" in bad.output
    r = runner.invoke(main, ["audit", "--database", db])
    assert r.exit_code == 0
    assert "token-create" in r.stdout and "token-revoke" in r.stdout and "command line" in r.stdout
    store.close()
