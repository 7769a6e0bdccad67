"""Reading and decoding request bodies: size limit, media type, strict JSON.

JSON is decoded with orjson, which rejects ``NaN``, ``Infinity`` and numbers
that overflow a double (``1e400``); Python's ``json`` would accept them.
"""

from __future__ import annotations

import asyncio
from typing import Any

import orjson
from fastapi import Request
from starlette.requests import ClientDisconnect

from leastwise.models import FieldError

from .deadlines import body_deadlines
from .problems import Problem

__all__ = ["read_json", "MISSING"]

MISSING: Any = object()


async def read_json(request: Request, limit: int, *, optional: bool = False) -> Any:
    """The decoded JSON body; ``MISSING`` for an empty body when ``optional``. Raises :class:`Problem`."""
    ctype = request.headers.get("content-type", "")
    if ctype:
        media = ctype.split(";", 1)[0].strip().lower()
        # lenient: gateways and curl often send JSON labelled as a form or text; only multipart is refused
        if media.startswith("multipart/"):
            raise Problem(415, "unsupported-media-type", f"send JSON (application/json), not {media}")
    declared = request.headers.get("content-length")
    if declared is not None:
        try:
            size = int(declared)
        except ValueError:
            raise Problem(400, "bad-request", "Content-Length is not a number") from None
        if size > limit:
            raise Problem(413, "content-too-large", f"the body is {size} bytes; the limit is {limit}")
    data = await _receive(request, limit)
    if len(data) > limit:
        raise Problem(413, "content-too-large", f"the body exceeds the limit of {limit} bytes")
    if not data.strip():
        if optional:
            return MISSING
        raise Problem(400, "malformed-json", "the body is empty; send a JSON object", [FieldError("", "empty body")])
    try:
        return orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        reason = str(exc)
    where = _locate_bad_number(data)
    if where is not None:
        pointer, text = where
        why = f"{text} is not a finite number (NaN, Infinity and values beyond the double range are refused)"
        raise Problem(422, "invalid-input", f"{pointer or '/'}: {why}", [FieldError(pointer, why)])
    raise Problem(400, "malformed-json", f"the body is not valid JSON: {reason}", [FieldError("", reason)])


async def _receive(request: Request, limit: int) -> bytes:
    """The body, read chunk by chunk with the size cap, within the body timeout (a slow sender gets 408)."""
    settings = getattr(request.app.state, "settings", None)
    seconds = getattr(settings, "body_timeout", 30)
    chunks = []
    total = 0
    # a coarse deadline (api/deadlines.py): cheaper than asyncio.timeout, answered at most 0.25 s late
    task = asyncio.current_task()
    assert task is not None
    deadlines = body_deadlines()
    deadlines.arm(task, seconds)
    try:
        while True:  # the ASGI messages directly: Request.stream() adds a generator per request
            message = await request.receive()
            if message["type"] == "http.disconnect":
                raise ClientDisconnect()
            chunk = message.get("body", b"")
            total += len(chunk)
            if total > limit:
                raise Problem(413, "content-too-large", f"the body exceeds the limit of {limit} bytes")
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
    except asyncio.CancelledError:
        if not deadlines.timed_out(task):
            raise  # cancelled for another reason (the client went away, shutdown)
        task.uncancel()
        raise Problem(408, "request-timeout", f"the body did not arrive within {seconds} s",
                      title="Request timeout", headers={"Connection": "close"}) from None
    finally:
        deadlines.disarm(task)
    return chunks[0] if len(chunks) == 1 else b"".join(chunks)


class _Bad:
    __slots__ = ("text",)

    def __init__(self, text: str) -> None:
        self.text = text


def _float(text: str) -> Any:
    value = float(text)
    return _Bad(text) if value in (float("inf"), float("-inf")) else value


def _int(text: str) -> Any:
    if len(text.lstrip("-")) > 308:
        return _Bad(text[:20] + "...")
    return int(text)


def _locate_bad_number(data: bytes) -> tuple[str, str] | None:
    """Where a body that orjson refused holds NaN/Infinity/an overflowing number, if that is why."""
    import json

    try:
        tree = json.loads(data, parse_constant=_Bad, parse_float=_float, parse_int=_int)
    except (ValueError, RecursionError):
        return None
    stack: list[tuple[str, Any]] = [("", tree)]
    while stack:
        where, node = stack.pop()
        if isinstance(node, _Bad):
            return where, node.text
        if isinstance(node, dict):
            stack.extend((f"{where}/{str(k).replace('~', '~0').replace('/', '~1')}", v) for k, v in reversed(list(node.items())))
        elif isinstance(node, list):
            stack.extend((f"{where}/{i}", v) for i, v in reversed(list(enumerate(node))))
    return None
