"""Token management and the audit trail over HTTP (admin tokens without a model pattern; see :mod:`.auth`).

| method, path | what |
|---|---|
| ``POST /v1/tokens`` | ``{"scope": "read"|"write"|"admin", "label": "...", "models": "plant-a-*"}`` → 201 with the token (shown once) |
| ``GET /v1/tokens`` | every token (never the token itself): id, label, scope, models, created, revoked |
| ``DELETE /v1/tokens/{id}`` | revoke (204; again: 204, nothing changes) |
| ``GET /v1/audit`` | newest first; filters ``model``, ``action``, ``outcome``, ``since``, ``until`` (RFC 3339 or epoch seconds), ``limit`` (1..1000, 100) |
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from leastwise.models import FieldError, InvalidInput
from leastwise.models.access import AccessControl, note_versions
from leastwise.models.inputs import parse_time

from .body import read_json
from .problems import Problem

__all__ = ["router", "TOKEN_REQUEST_SCHEMA"]

router = APIRouter()

TOKEN_REQUEST_SCHEMA: dict[str, Any] = {
    "type": "object",
    "additionalProperties": False,
    "required": ["scope"],
    "properties": {
        "scope": {"type": "string", "enum": ["read", "write", "admin"]},
        "label": {"type": ["string", "null"], "maxLength": 200},
        "models": {"type": ["string", "null"], "pattern": r"^[A-Za-z0-9._\-*?\[\]!]{1,200}$",
                   "description": "fnmatch glob on model names, case-sensitive: * ? [...] [!...]; null: every model"},
    },
}


def _access(request: Request) -> AccessControl:
    return request.app.state.access


def _json(data: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    from .routes import json_response

    return json_response(data, status, headers)


def _token_id(raw: str) -> int:
    if not raw.isdigit() or len(raw) > 18:
        raise Problem(404, "not-found", f"no token {raw!r}: token ids are positive integers",
                      [FieldError("token", "must be a positive integer")])
    return int(raw)


@router.post("/v1/tokens", status_code=201, openapi_extra={"requestBody": {
    "required": True, "content": {"application/json": {"schema": TOKEN_REQUEST_SCHEMA}}}})
async def post_token(request: Request) -> Response:
    body = await read_json(request, request.app.state.settings.max_body_bytes)
    if not isinstance(body, dict):
        raise InvalidInput.at("", 'the body must be {"scope": ..., "label": ..., "models": ...}')
    unknown = [k for k in body if k not in ("scope", "label", "models")]
    if unknown:
        raise InvalidInput(f"unknown fields: {', '.join(map(repr, unknown))}",
                           [FieldError("/" + k.replace("~", "~0").replace("/", "~1"), "unknown field") for k in unknown])
    record, token = await run_in_threadpool(_access(request).create_token, body.get("scope"), body.get("label"),
                                            body.get("models"))
    note_versions(None, None, detail=f"token {record.id} {record.label!r} scope {record.scope} models {record.models!r}")
    return _json({**record.view(), "token": token}, 201, {"Location": f"/v1/tokens/{record.id}",
                                                          "Cache-Control": "no-store"})


@router.get("/v1/tokens")
async def get_tokens(request: Request, revoked: bool = Query(True, description="include revoked tokens")) -> Response:
    records = await run_in_threadpool(_access(request).list_tokens, revoked)
    return _json({"tokens": [r.view() for r in records]})


@router.delete("/v1/tokens/{token}", status_code=204)
async def delete_token(token: str, request: Request) -> Response:
    record, changed = await run_in_threadpool(_access(request).revoke_token, _token_id(token))
    note_versions(None, None, detail=f"token {record.id} {record.label!r}" + ("" if changed else " (already revoked)"))
    return Response(status_code=204)


def _when(raw: str | None, where: str) -> float | None:
    if raw is None:
        return None
    try:
        value: Any = float(raw)
    except ValueError:
        value = raw
    return parse_time(value, where)


@router.get("/v1/audit")
async def get_audit(
    request: Request,
    model: str | None = Query(None, max_length=128),
    action: str | None = Query(None, max_length=64),
    outcome: str | None = Query(None, pattern="^(ok|failed|denied)$"),
    since: str | None = Query(None, max_length=64, description="RFC 3339 time or epoch seconds (inclusive)"),
    until: str | None = Query(None, max_length=64, description="RFC 3339 time or epoch seconds (exclusive)"),
    limit: int = Query(100, ge=1, le=1000),
) -> Response:
    t0, t1 = _when(since, "since"), _when(until, "until")
    entries = await run_in_threadpool(lambda: _access(request).audit(
        model=model, action=action, outcome=outcome, since=t0, until=t1, limit=limit))
    return _json({"entries": entries})
