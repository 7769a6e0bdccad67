"""RFC 9457 problem details: every error answer of the API.

``{"type", "title", "status", "detail", "instance", "errors": [{"pointer", "reason"}]}``
with ``Content-Type: application/problem+json``. ``pointer`` is an RFC 6901
JSON pointer into the request body (or a parameter name such as ``name``).
"""

from __future__ import annotations

import logging
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from leastwise.engine import EngineError
from leastwise.models import FieldError, RegistryError

__all__ = ["Problem", "problem_response", "exception_response", "install_handlers", "PROBLEM_TYPE_BASE"]

PROBLEM_TYPE_BASE = "https://leastwise.dev/problems/"
MEDIA_TYPE = "application/problem+json"

log = logging.getLogger("leastwise.api")

_TITLES = {400: "Bad request", 401: "Unauthorized", 403: "Forbidden", 404: "Not found", 405: "Method not allowed",
           406: "Not acceptable", 409: "Conflict", 411: "Length required", 413: "Content too large",
           415: "Unsupported media type", 422: "Invalid input", 429: "Too many requests",
           500: "Internal server error", 503: "Service unavailable"}


class Problem(Exception):
    """Raise from a route to answer with a problem document."""

    def __init__(self, status: int, slug: str, detail: str, errors: list[FieldError] | None = None,
                 title: str | None = None, headers: dict[str, str] | None = None) -> None:
        super().__init__(detail)
        self.status, self.slug, self.detail = status, slug, detail
        self.errors = errors or []
        self.title = title or _TITLES.get(status, "Error")
        self.headers = headers or {}


def problem_response(request: Request | None, status: int, slug: str, title: str, detail: str,
                     errors: list[FieldError] | None = None, headers: dict[str, str] | None = None) -> Response:
    body: dict[str, Any] = {"type": PROBLEM_TYPE_BASE + slug, "title": title, "status": status, "detail": detail}
    if request is not None:
        body["instance"] = request.url.path
    if errors:
        body["errors"] = [{"pointer": e.pointer, "reason": e.reason} for e in errors]
    return Response(orjson.dumps(body), status_code=status, media_type=MEDIA_TYPE, headers=headers)


async def _problem(request: Request, exc: Problem) -> Response:
    return problem_response(request, exc.status, exc.slug, exc.title, exc.detail, exc.errors, exc.headers)


async def _registry(request: Request, exc: RegistryError) -> Response:
    return problem_response(request, exc.status, exc.slug, exc.title, exc.detail, exc.errors)


async def _engine(request: Request, exc: EngineError) -> Response:
    return problem_response(request, 422, "invalid-input", "Invalid input", str(exc), [FieldError("", str(exc))])


async def _validation(request: Request, exc: RequestValidationError) -> Response:
    errors = []
    for err in exc.errors():
        loc = [str(p) for p in err.get("loc", ())]
        where = loc[-1] if loc and loc[0] in ("path", "query", "header") else "/" + "/".join(loc[1:])
        errors.append(FieldError(where, str(err.get("msg", "invalid"))))
    detail = "; ".join(f"{e.pointer}: {e.reason}" for e in errors) or "invalid request"
    return problem_response(request, 422, "invalid-input", "Invalid input", detail, errors)


async def _http(request: Request, exc: StarletteHTTPException) -> Response:
    status = exc.status_code
    slug = {404: "not-found", 405: "method-not-allowed"}.get(status, "http-error")
    detail = exc.detail if isinstance(exc.detail, str) else _TITLES.get(status, "error")
    if status == 404 and detail == "Not Found":
        detail = f"no route for {request.method} {request.url.path}"
    return problem_response(request, status, slug, _TITLES.get(status, "Error"), detail,
                            headers=dict(exc.headers or {}))


async def _unexpected(request: Request, exc: Exception) -> Response:
    from sqlalchemy.exc import OperationalError

    if isinstance(exc, OperationalError):
        log.error("database unavailable", extra={"path": request.url.path, "error": type(exc).__name__})
        return problem_response(request, 503, "database-unavailable", _TITLES[503],
                                "the database did not answer; nothing was applied, retry later",
                                headers={"Retry-After": "1"})
    log.exception("unexpected error", extra={"path": request.url.path, "method": request.method})
    return problem_response(request, 500, "internal-error", _TITLES[500], "an unexpected server error occurred")


#: exception type -> answer; the most specific class in an exception's MRO wins (as in Starlette)
_HANDLERS: dict[type[BaseException], Any] = {
    Problem: _problem,
    RegistryError: _registry,
    EngineError: _engine,
    RequestValidationError: _validation,
    StarletteHTTPException: _http,
    Exception: _unexpected,
}


async def exception_response(request: Request, exc: Exception) -> Response:
    """The problem document for ``exc``, as the installed handlers give it (for routes outside the router)."""
    for cls in type(exc).__mro__:
        handler = _HANDLERS.get(cls)
        if handler is not None:
            return await handler(request, exc)
    raise exc  # pragma: no cover - Exception is in every MRO


def install_handlers(app: FastAPI) -> None:
    """Map every exception to a problem document; client errors are never 5xx."""
    for cls, handler in _HANDLERS.items():
        app.add_exception_handler(cls, handler)
