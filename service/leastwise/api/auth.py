"""Access control for ``/v1``: bearer tokens, the scope table, model patterns, audit recording.

A pure ASGI middleware in front of every route, so it also covers routes
added later and answers before any body is read (an unauthenticated client
cannot make the service buffer anything).

* No unrevoked token in the database (and the service bound to loopback):
  everything is open, as before; operator actions are still audited (token
  label ``null``).
* Otherwise every ``/v1`` request needs ``Authorization: Bearer <token>``:
  none, garbled, unknown or revoked → 401; scope too low, or a model name
  outside the token's pattern → 403 (both ``application/problem+json``).
* A model outside a token's pattern is answered 403 whether or not it exists
  (decided from the name and the token alone, before the database is asked),
  so a limited token cannot learn which other models exist, existed or were
  deleted. ``GET /v1/models`` lists only the models the token may see.
* ``access_token`` in the query string (RFC 6750 §2.3) is refused with 400:
  URLs end up in proxy and browser logs.
* ``/healthz``, ``/docs`` and ``/openapi.json`` stay open; they carry no data.

:data:`ROUTE_SCOPES` is the scope table. A ``/v1`` route not in it needs
``read`` for GET and ``admin`` for anything else, with its model checked
against the pattern when it is under ``/v1/models/{name}``.
"""

from __future__ import annotations

import asyncio
import logging
import re
from dataclasses import dataclass
from typing import Any
from urllib.parse import parse_qsl

import orjson
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from leastwise.models.access import (
    MAX_TOKEN_LENGTH,
    TOKEN_SYNTAX,
    AccessControl,
    AuditNote,
    TokenRecord,
    pattern_allows,
    reset_note,
    set_note,
)

from .problems import MEDIA_TYPE, PROBLEM_TYPE_BASE

__all__ = ["AccessMiddleware", "ROUTE_SCOPES", "Rule", "classify", "principal", "may_see"]

log = logging.getLogger("leastwise.api.auth")


@dataclass(frozen=True, slots=True)
class Rule:
    method: str
    path: str          # the route template
    scope: str         # read, write or admin
    action: str        # audit action name
    unlimited: bool = False  # needs a token without a model pattern

    @property
    def audited(self) -> bool:
        """Operator actions: admin changes. (Refused attempts on any route are audited too.)"""
        return self.scope == "admin" and self.method != "GET"


#: the scope table: (method, route) -> required scope
ROUTE_SCOPES: tuple[Rule, ...] = (  # the hottest first: classify() stops at the first match
    Rule("POST", "/v1/models/{name}/observations", "write", "observe"),
    Rule("GET", "/v1/models/{name}", "read", "state"),
    Rule("GET", "/v1/models", "read", "list"),
    Rule("GET", "/v1/models/{name}/drift", "read", "drift"),
    Rule("GET", "/v1/models/{name}/drift/events", "read", "drift-events"),
    Rule("POST", "/v1/models/{name}/drift/reference", "admin", "drift-reference"),
    Rule("GET", "/v1/models/{name}/covariance", "read", "covariance"),
    Rule("POST", "/v1/models/{name}/predict", "read", "predict"),
    Rule("GET", "/v1/models/{name}/snapshots", "read", "snapshots"),
    Rule("PUT", "/v1/models/{name}", "admin", "create"),
    Rule("DELETE", "/v1/models/{name}", "admin", "delete"),
    Rule("POST", "/v1/models/{name}/reset", "admin", "reset"),
    Rule("POST", "/v1/models/{name}/snapshots", "admin", "snapshot"),
    Rule("POST", "/v1/models/{name}/snapshots/{snapshot}/restore", "admin", "restore"),
    Rule("DELETE", "/v1/models/{name}/snapshots/{snapshot}", "admin", "snapshot-delete"),
    Rule("POST", "/v1/tokens", "admin", "token-create", unlimited=True),
    Rule("GET", "/v1/tokens", "admin", "tokens", unlimited=True),
    Rule("DELETE", "/v1/tokens/{token}", "admin", "token-revoke", unlimited=True),
    Rule("GET", "/v1/audit", "admin", "audit", unlimited=True),
    Rule("GET", "/v1/metrics", "read", "metrics"),  # service-wide counts, nothing per model
)


def _compile(template: str) -> re.Pattern[str]:
    return re.compile("^" + re.sub(r"\\\{(\w+)\\\}", r"(?P<\1>[^/]*)", re.escape(template)) + "$")


_TABLE = [(rule, _compile(rule.path)) for rule in ROUTE_SCOPES]


def classify(method: str, path: str) -> tuple[Rule, str | None]:
    """The rule for a ``/v1`` request and the model name it concerns (``None`` if none)."""
    for rule, regex in _TABLE:
        if rule.method == method:
            m = regex.match(path)
            if m is not None:
                return rule, m.groupdict().get("name")
    parts = path.split("/")
    model = parts[3] if len(parts) > 3 and parts[2] == "models" else None
    tail = "/".join(parts[4:]) if model is not None else "/".join(parts[2:])
    scope = "read" if method in ("GET", "HEAD") else "admin"
    return Rule(method, path, scope, f"{method.lower()} {tail or 'model'}"), model


def principal(request: Request) -> TokenRecord | None:
    """The token of the request (``None``: no tokens configured)."""
    return request.scope.get("state", {}).get("principal")


def may_see(request: Request, model: str) -> bool:
    token = principal(request)
    return token is None or pattern_allows(token.models, model)


def _problem(status: int, slug: str, title: str, detail: str, path: str,
             headers: dict[str, str] | None = None) -> tuple[dict, bytes]:
    body = orjson.dumps({"type": PROBLEM_TYPE_BASE + slug, "title": title, "status": status, "detail": detail,
                         "instance": path})
    raw = [(b"content-type", MEDIA_TYPE.encode()), (b"content-length", str(len(body)).encode())]
    raw += [(k.lower().encode("latin-1"), v.encode("latin-1")) for k, v in (headers or {}).items()]
    return {"type": "http.response.start", "status": status, "headers": raw}, body


async def _answer(send: Any, start: dict, body: bytes) -> None:
    await send(start)
    await send({"type": "http.response.body", "body": body, "more_body": False})


_REALM = 'Bearer realm="leastwise"'


def _consume_outcome(task: asyncio.Task) -> None:
    """Read a token reload's error so it is not reported as never retrieved (its waiters got it)."""
    if not task.cancelled() and task.exception() is not None:
        log.debug("token reload failed", exc_info=task.exception())


class AccessMiddleware:
    """See the module docstring. ``require_tokens``: with no tokens, refuse everything (non-loopback binding)."""

    def __init__(self, app: Any, access: AccessControl, require_tokens: bool = False) -> None:
        self.app = app
        self.access = access
        self.require_tokens = require_tokens
        self._refreshing: asyncio.Task | None = None  # the token reload in flight (see _tokens)
        self._refreshing_generation = -1  # the access generation it began in

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        path = scope.get("path", "") if scope["type"] == "http" else ""
        if not (path == "/v1" or path.startswith("/v1/")):
            await self.app(scope, receive, send)
            return
        method = scope.get("method", "GET")
        rule, model = classify(method, path)
        query = scope.get("query_string", b"")
        if query and any(k.lower() == "access_token"
                         for k, _ in parse_qsl(query.decode("latin-1"), keep_blank_values=True)):
            start, body = _problem(400, "token-in-query", "Bad request",
                                   "access tokens are not accepted in the query string (URLs are logged); "
                                   "send the header Authorization: Bearer <token>", path)
            await _answer(send, start, body)
            return

        active = self.access.cached()  # fresh for a second: no database, no thread hop per request
        if active is None:
            active = await self._tokens()
        token: TokenRecord | None = None
        if active:
            token, problem = self._authenticate(scope, path, active)
            if problem is not None:
                await _answer(send, *problem)
                return
            assert token is not None
            refusal = self._refusal(token, rule, model)
            if refusal is not None:
                await self._record(AuditNote(rule.action, model, detail=refusal), token, 403, "denied")
                start, body = _problem(403, "forbidden", "Forbidden", refusal, path)
                await _answer(send, start, body)
                return
        elif self.require_tokens:
            start, body = _problem(401, "unauthorized", "Unauthorized",
                                   "no access token exists and the service listens beyond loopback: "
                                   "create one with `leastwise token create --scope admin`", path,
                                   {"WWW-Authenticate": _REALM})
            await _answer(send, start, body)
            return

        scope.setdefault("state", {})["principal"] = token
        if not rule.audited:
            await self.app(scope, receive, send)
            return
        await self._audited(scope, receive, send, rule, model, token)

    async def _tokens(self) -> list:
        """The active tokens once the cache has expired: one reload at a time per event loop.

        Every request that found the cache expired used to start its own reload
        in a worker thread: at 16 connections sixteen reads of the token table at
        once, every second, each handing the interpreter lock back and forth with
        the event loop. Now the first starts the reload and the others, while it
        runs, use the list loaded up to twice ``cache_seconds`` ago (a revocation
        by another process still takes effect within about ``cache_seconds``
        plus one reload); older than that (or invalidated by a change made
        here), they wait for the reload and share its outcome. A reload begun
        before such a change is not shared by the requests after it: they start
        their own, which sees the change.
        """
        loop = asyncio.get_running_loop()
        task = self._refreshing
        generation = self.access.generation
        if (task is None or task.done() or task.get_loop() is not loop
                or self._refreshing_generation != generation):
            task = self._refreshing = loop.create_task(run_in_threadpool(self.access.refresh))
            self._refreshing_generation = generation
            task.add_done_callback(_consume_outcome)
        stale = self.access.cached(2 * self.access.cache_seconds)
        if stale is not None:
            return stale
        return await asyncio.shield(task)  # a request that goes away does not cancel the others' reload

    # ------------------------------------------------------------ decisions
    def _authenticate(self, scope: dict, path: str,
                      active: list) -> tuple[TokenRecord | None, tuple[dict, bytes] | None]:
        values = [v for k, v in scope.get("headers", ()) if k.lower() == b"authorization"]
        if not values:
            return None, _problem(401, "unauthorized", "Unauthorized",
                                  "this service needs a bearer token: send Authorization: Bearer <token>", path,
                                  {"WWW-Authenticate": _REALM})
        bad = 'Bearer realm="leastwise", error="invalid_token"'
        if len(values) > 1:
            return None, _problem(401, "unauthorized", "Unauthorized", "send exactly one Authorization header", path,
                                  {"WWW-Authenticate": bad})
        raw = values[0].decode("latin-1").strip()
        scheme, _, credential = raw.partition(" ")
        credential = credential.strip()
        if scheme.lower() != "bearer" or not credential:
            return None, _problem(401, "unauthorized", "Unauthorized",
                                  "the Authorization header must be 'Bearer <token>'", path, {"WWW-Authenticate": bad})
        if len(credential) > MAX_TOKEN_LENGTH or not TOKEN_SYNTAX.fullmatch(credential):
            return None, _problem(401, "unauthorized", "Unauthorized", "the bearer token is malformed", path,
                                  {"WWW-Authenticate": bad})
        token = self.access.authenticate(credential, active)
        if token is None:
            return None, _problem(401, "unauthorized", "Unauthorized", "the bearer token is unknown or revoked", path,
                                  {"WWW-Authenticate": bad})
        return token, None

    @staticmethod
    def _refusal(token: TokenRecord, rule: Rule, model: str | None) -> str | None:
        if not token.allows(rule.scope):
            return f"this needs a token with scope {rule.scope}; token {token.label!r} has scope {token.scope}"
        if rule.unlimited and not token.unlimited:
            return f"this needs an admin token without a model pattern; token {token.label!r} is limited to {token.models!r}"
        if model is not None and not pattern_allows(token.models, model):
            return f"token {token.label!r} is limited to models matching {token.models!r}"
        return None

    # ------------------------------------------------------------ audit
    async def _record(self, note: AuditNote, token: TokenRecord | None, status: int, outcome: str) -> None:
        try:
            await run_in_threadpool(
                self.access.record, action=note.action or "unknown", token_label=token.label if token else None,
                model=note.model, version_before=note.version_before, version_after=note.version_after,
                outcome=outcome, status=status, detail=note.detail)
        except Exception:  # noqa: BLE001 - an audit failure is logged, the answer still goes out
            log.exception("audit entry not written", extra={"action": note.action, "model": note.model})

    async def _audited(self, scope: dict, receive: Any, send: Any, rule: Rule, model: str | None,
                       token: TokenRecord | None) -> None:
        """Run the route; write the audit entry before the last body chunk of the answer leaves."""
        note = AuditNote(rule.action, model)
        status = 500
        captured = bytearray()
        recorded = False

        async def _send(message: dict) -> None:
            nonlocal status, recorded
            if message["type"] == "http.response.start":
                status = message["status"]
            elif message["type"] == "http.response.body" and not recorded:
                if status >= 400 and len(captured) < 4096:
                    captured.extend(message.get("body", b"")[:4096])
                if not message.get("more_body", False):
                    recorded = True
                    await self._finish(note, token, status, bytes(captured))
            await send(message)

        ctx = set_note(note)
        try:
            await self.app(scope, receive, _send)
        finally:
            reset_note(ctx)
            if not recorded:  # the route raised past the error handlers, or the client went away
                await self._finish(note, token, status, bytes(captured))

    async def _finish(self, note: AuditNote, token: TokenRecord | None, status: int, body: bytes) -> None:
        outcome = "ok" if status < 400 else "failed"
        if status >= 400 and body:
            try:
                detail = orjson.loads(body).get("detail")
                if isinstance(detail, str):
                    note.detail = detail if note.detail is None else f"{note.detail}; {detail}"
            except (orjson.JSONDecodeError, AttributeError):
                pass
        if token is None and note.detail is None:
            note.detail = "no tokens configured"
        await self._record(note, token, status, outcome)


def install_access(app: Any, settings: Any, store: Any) -> AccessControl:
    """The hook ``create_app`` calls: token/audit routes, the middleware, the OpenAPI security description.

    Binding beyond loopback (``settings.host``) makes the middleware refuse
    every ``/v1`` request while no token exists, so revoking the last token
    cannot open the service to the network.
    """
    from leastwise.serve import is_loopback

    from .admin import router as admin_router
    from .openapi import install_openapi

    access = AccessControl(store)
    app.state.access = access
    app.include_router(admin_router)
    app.add_middleware(AccessMiddleware, access=access, require_tokens=not is_loopback(settings.host))
    install_openapi(app)
    return access
