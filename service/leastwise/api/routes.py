"""The REST contract v1 (see DESIGN.md). Handlers read and decode the body, then hand over to the registry in a worker thread."""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from leastwise.models import FieldError, Registry

from .auth import may_see
from .body import MISSING, read_json
from .metrics import CONTENT_TYPE_LATEST
from .problems import Problem

__all__ = ["router", "json_response", "model_state", "observe", "prefers_minimal"]

router = APIRouter()


def _default(value: Any) -> Any:
    item = getattr(value, "item", None)  # numpy scalars
    if item is not None:
        return item()
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def json_response(data: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    return Response(orjson.dumps(data, default=_default), status_code=status, media_type="application/json",
                    headers=headers)


def _registry(request: Request) -> Registry:
    return request.app.state.registry


def _limit(request: Request) -> int:
    return request.app.state.settings.max_body_bytes


def _snapshot_id(raw: str) -> int:
    if not raw.isdigit() or len(raw) > 18:
        raise Problem(404, "not-found", f"no snapshot {raw!r}: snapshot ids are positive integers",
                      [FieldError("id", "must be a positive integer")])
    return int(raw)


def _etag_matches(header: str | None, etag: str) -> bool:
    if not header:
        return False
    if header.strip() == "*":
        return True
    tags = [t.strip() for t in header.split(",")]
    return any(t == etag or t.removeprefix("W/") == etag for t in tags)


@router.get("/healthz")
async def healthz() -> Response:
    return json_response({"status": "ok"})


@router.get("/v1/metrics")
async def metrics(request: Request) -> Response:
    """Prometheus text exposition of the service's counts (api/metrics.py); built from memory only."""
    body = await run_in_threadpool(request.app.state.metrics.render)
    return Response(body, media_type=CONTENT_TYPE_LATEST, headers={"Cache-Control": "no-store"})


@router.get("/v1/models")
async def list_models(request: Request) -> Response:
    models = await run_in_threadpool(_registry(request).list)
    models = [m for m in models if may_see(request, m["name"])]  # a token's model pattern (api/auth.py)
    return json_response({"models": models})


@router.put("/v1/models/{name}")
async def put_model(name: str, request: Request) -> Response:
    body = await read_json(request, _limit(request))
    out, created = await run_in_threadpool(_registry(request).create, name, body)
    return json_response(out, 201 if created else 200, {"Location": f"/v1/models/{name}"} if created else None)


@router.get("/v1/models/{name}")
async def get_model(name: str, request: Request) -> Response:
    return await model_state(name, request)


async def model_state(name: str, request: Request) -> Response:
    """``GET /v1/models/{name}`` (also answered by the fast lane, api/fastlane.py)."""
    registry = _registry(request)
    wanted = request.headers.get("if-none-match")
    # Dashboards poll: on the embedded database a fresh, already built answer is given
    # straight from the event loop (a ~15 us check), saving the worker-thread hop.
    fresh = registry.get_if_fresh(name) if request.app.state.inline_reads else None
    if fresh is None:
        if wanted:
            etag = await run_in_threadpool(registry.etag, name)
            if _etag_matches(wanted, etag):
                return Response(status_code=304, headers={"ETag": etag, "Cache-Control": "no-cache"})
        out, etag = await run_in_threadpool(registry.get, name)
    else:
        out, etag = fresh
        if wanted and _etag_matches(wanted, etag):
            return Response(status_code=304, headers={"ETag": etag, "Cache-Control": "no-cache"})
    return Response(_body_bytes(request.app.state.serialised, name, out), media_type="application/json",
                    headers={"ETag": etag, "Cache-Control": "no-cache"})


def _body_bytes(kept: dict[str, tuple[Any, bytes]], name: str, body: Any) -> bytes:
    """The JSON of a GET body, kept per model while the registry hands out the same body object.

    The registry shares one body per version (built once, never mutated), so
    an identity check (the kept reference keeps the id unique) tells whether
    the kept serialisation still applies.
    """
    entry = kept.get(name)
    if entry is not None and entry[0] is body:
        return entry[1]
    data = orjson.dumps(body, default=_default)
    if len(kept) >= 65536:  # bounded: dashboards poll a working set, not every model
        kept.clear()
    kept[name] = (body, data)
    return data


@router.delete("/v1/models/{name}")
async def delete_model(name: str, request: Request) -> Response:
    await run_in_threadpool(_registry(request).delete, name)
    return Response(status_code=204)


@router.post("/v1/models/{name}/observations")
async def post_observations(name: str, request: Request) -> Response:
    return await observe(name, request)


async def observe(name: str, request: Request) -> Response:
    """``POST /v1/models/{name}/observations`` (also answered by the fast lane, api/fastlane.py).

    ``Prefer: return=minimal`` (RFC 7240): the answer leaves out the model's
    coefficients, sigma and identifiability (a gateway that only posts needs
    neither, and each costs a solution per model and group); per-observation
    results, ``version`` and ``n`` stay.
    """
    body = await read_json(request, _limit(request))
    minimal = prefers_minimal(request.headers.getlist("prefer"))
    answer = await _registry(request).observe_async(name, body, minimal=minimal)
    if not minimal:
        return json_response(answer)
    if "coefficients" in answer:  # answered by a path that solved anyway (a retry, a model just loaded)
        answer = {k: v for k, v in answer.items() if k not in MODEL_FIELDS}
    return json_response(answer, headers=_MINIMAL_APPLIED)


#: The committed model's fields that ``Prefer: return=minimal`` leaves out of an observation answer.
MODEL_FIELDS = frozenset({"coefficients", "sigma", "identifiable"})
_MINIMAL_APPLIED = {"Preference-Applied": "return=minimal"}


def prefers_minimal(values: list[str]) -> bool:
    """True when the ``Prefer`` header(s) ask for ``return=minimal`` (RFC 7240 sections 2 and 4.2).

    Preferences are comma-separated, each ``token [= value] *(; parameter)``; the
    token is case-insensitive and the value may be quoted. Preferences not understood
    are ignored, as the RFC asks; with both ``return`` values, the first one counts.
    """
    for value in values:
        for preference in value.split(","):
            head = preference.split(";", 1)[0]
            token, _, word = head.partition("=")
            if token.strip().lower() == "return":
                return word.strip().strip('"').lower() == "minimal"
    return False


@router.post("/v1/models/{name}/predict")
async def post_predict(name: str, request: Request) -> Response:
    body = await read_json(request, _limit(request))
    out = await run_in_threadpool(_registry(request).predict, name, body)
    return json_response(out)


@router.get("/v1/models/{name}/drift")
async def get_drift(name: str, request: Request) -> Response:
    history = _flag(request.query_params.get("history"), "history")
    return json_response(await run_in_threadpool(_registry(request).drift, name, history))


def _flag(raw: str | None, name: str) -> bool:
    if raw is None or raw in ("0", "false", ""):
        return False
    if raw in ("1", "true"):
        return True
    raise Problem(422, "invalid-input", f"{name} must be true or false", [FieldError(name, "must be true or false")])


def _count(raw: str | None, name: str, default: int, top: int) -> int:
    if raw is None:
        return default
    if not raw.isdigit() or len(raw) > 18 or int(raw) > top:
        raise Problem(422, "invalid-input", f"{name} must be an integer from 0 to {top}",
                      [FieldError(name, f"must be an integer from 0 to {top}")])
    return int(raw)


@router.get("/v1/models/{name}/drift/events")
async def get_drift_events(name: str, request: Request) -> Response:
    qp = request.query_params
    after = _count(qp.get("after"), "after", 0, 2**62)
    limit = max(1, _count(qp.get("limit"), "limit", 100, 1000))
    status = qp.get("status")
    if status is not None and status not in ("ok", "watch", "alarm"):
        raise Problem(422, "invalid-input", "status must be ok, watch or alarm",
                      [FieldError("status", "must be ok, watch or alarm")])
    out = await run_in_threadpool(_registry(request).drift_events, name, after, limit, status)
    return json_response(out)


@router.post("/v1/models/{name}/drift/reference")
async def post_drift_reference(name: str, request: Request) -> Response:
    body = await read_json(request, _limit(request), optional=True)
    out = await run_in_threadpool(_registry(request).move_reference, name, None if body is MISSING else body)
    return json_response(out)


@router.get("/v1/models/{name}/covariance")
async def get_covariance(name: str, request: Request) -> Response:
    return json_response(await run_in_threadpool(_registry(request).covariance, name))


@router.post("/v1/models/{name}/reset")
async def post_reset(name: str, request: Request) -> Response:
    await read_json(request, _limit(request), optional=True)
    return json_response(await run_in_threadpool(_registry(request).reset, name))


@router.post("/v1/models/{name}/snapshots")
async def post_snapshot(name: str, request: Request) -> Response:
    body = await read_json(request, _limit(request), optional=True)
    out = await run_in_threadpool(_registry(request).snapshot, name, None if body is MISSING else body)
    return json_response(out, 201, {"Location": f"/v1/models/{name}/snapshots/{out['id']}"})


@router.get("/v1/models/{name}/snapshots")
async def get_snapshots(name: str, request: Request) -> Response:
    return json_response({"snapshots": await run_in_threadpool(_registry(request).snapshots, name)})


@router.post("/v1/models/{name}/snapshots/{snapshot}/restore")
async def post_restore(name: str, snapshot: str, request: Request) -> Response:
    await read_json(request, _limit(request), optional=True)
    sid = _snapshot_id(snapshot)
    return json_response(await run_in_threadpool(_registry(request).restore, name, sid))


@router.delete("/v1/models/{name}/snapshots/{snapshot}")
async def delete_snapshot(name: str, snapshot: str, request: Request) -> Response:
    sid = _snapshot_id(snapshot)
    await run_in_threadpool(_registry(request).delete_snapshot, name, sid)
    return Response(status_code=204)
