"""Exceptions of the client: one per RFC 9457 problem type, plus transport failures.

Every answer with ``application/problem+json`` (or any 4xx/5xx) becomes a
:class:`Problem` subclass chosen by the problem type (the last path segment
of ``type``, e.g. ``not-found``), else by the HTTP status.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = [
    "LeastwiseError", "Unreachable", "Problem", "FieldProblem",
    "BadRequest", "Unauthorized", "Forbidden", "NotFound", "MethodNotAllowed", "RequestTimeout", "Conflict", "Busy",
    "PayloadTooLarge", "UnsupportedMediaType", "InvalidInput", "TooManyRequests", "ServerError",
    "ServiceUnavailable", "problem_from_response",
]


class LeastwiseError(Exception):
    """Base class of everything this client raises."""


class Unreachable(LeastwiseError):
    """No answer from the service (refused, reset, timed out) after the configured retries."""

    def __init__(self, url: str, reason: str) -> None:
        super().__init__(f"cannot reach the leastwise service at {url}: {reason}")
        self.url = url
        self.reason = reason


@dataclass(frozen=True, slots=True)
class FieldProblem:
    """One rejected field: an RFC 6901 JSON pointer into the request body (or a parameter name) and why."""

    pointer: str
    reason: str


class Problem(LeastwiseError):
    """The service refused the request (RFC 9457 problem details). Nothing was changed."""

    #: problem-type slugs (``https://leastwise.dev/problems/<slug>``) this class stands for
    slugs: tuple[str, ...] = ()

    def __init__(self, status: int, type: str, title: str, detail: str, errors: list[FieldProblem] | None = None,
                 instance: str | None = None, headers: dict[str, str] | None = None,
                 body: dict[str, Any] | None = None) -> None:
        super().__init__(f"{status} {title}: {detail}" if detail else f"{status} {title}")
        self.status = status
        self.type = type
        self.title = title
        self.detail = detail
        self.errors = list(errors or [])
        self.instance = instance
        self.headers = dict(headers or {})
        self.body = dict(body or {})

    @property
    def slug(self) -> str:
        """The last segment of the problem type, e.g. ``"not-found"``."""
        return self.type.rstrip("/").rsplit("/", 1)[-1] if self.type else ""

    @property
    def pointer(self) -> str | None:
        """The first rejected field's pointer, if the service named one."""
        return self.errors[0].pointer if self.errors else None

    @property
    def reason(self) -> str | None:
        """The first rejected field's reason, else the detail."""
        return self.errors[0].reason if self.errors else (self.detail or None)

    @property
    def retry_after(self) -> float | None:
        raw = self.headers.get("retry-after")
        try:
            return float(raw) if raw is not None else None
        except ValueError:
            return None


class BadRequest(Problem):
    """400: the body is not valid JSON, or the request is malformed."""
    slugs = ("bad-request", "malformed-json")


class Unauthorized(Problem):
    """401: no token, or an unknown or expired one."""
    slugs = ("unauthorized", "missing-token", "invalid-token")


class Forbidden(Problem):
    """403: the token is valid but not allowed to do this."""
    slugs = ("forbidden",)


class NotFound(Problem):
    """404: no such model, snapshot or route."""
    slugs = ("not-found",)


class MethodNotAllowed(Problem):
    slugs = ("method-not-allowed",)


class RequestTimeout(Problem):
    """408: the body did not arrive in time; nothing was applied, sending again is safe."""
    slugs = ("request-timeout",)


class Conflict(Problem):
    """409: e.g. the model exists with a different configuration."""
    slugs = ("conflict",)


class Busy(Conflict):
    """409: the model kept changing under concurrent writers; retrying is safe."""
    slugs = ("busy",)


class PayloadTooLarge(Problem):
    """413: the body is over the service's limit; send smaller batches."""
    slugs = ("content-too-large", "payload-too-large")


class UnsupportedMediaType(Problem):
    slugs = ("unsupported-media-type",)


class InvalidInput(Problem):
    """422: a field was rejected; see :attr:`errors` (pointer and reason per field)."""
    slugs = ("invalid-input",)


class TooManyRequests(Problem):
    slugs = ("too-many-requests", "rate-limited")


class ServerError(Problem):
    """500: an unexpected error in the service."""
    slugs = ("internal-error",)


class ServiceUnavailable(Problem):
    """503: the service or its database is unavailable; nothing was applied, retry later."""
    slugs = ("database-unavailable", "service-unavailable", "unavailable")


_BY_STATUS: dict[int, type[Problem]] = {
    400: BadRequest, 401: Unauthorized, 403: Forbidden, 404: NotFound, 405: MethodNotAllowed, 408: RequestTimeout,
    409: Conflict,
    413: PayloadTooLarge, 415: UnsupportedMediaType, 422: InvalidInput, 429: TooManyRequests, 500: ServerError,
    503: ServiceUnavailable,
}
_BY_SLUG: dict[str, type[Problem]] = {s: cls for cls in _BY_STATUS.values() for s in cls.slugs}
_BY_SLUG["busy"] = Busy


def problem_from_response(status: int, headers: Any, body: Any, text: str = "") -> Problem:
    """The exception for an error answer (``body`` is the decoded JSON, or None)."""
    doc = body if isinstance(body, dict) else {}
    ptype = str(doc.get("type") or "")
    slug = ptype.rstrip("/").rsplit("/", 1)[-1] if ptype else ""
    cls = _BY_SLUG.get(slug)
    if cls is None:
        cls = _BY_STATUS.get(status)
    if cls is None:
        cls = ServerError if status >= 500 else Problem
    errors = []
    for item in doc.get("errors") or []:
        if isinstance(item, dict):
            errors.append(FieldProblem(str(item.get("pointer", "")), str(item.get("reason", ""))))
    detail = doc.get("detail")
    if detail is None:
        detail = text.strip()[:500]
    hdrs = {k.lower(): v for k, v in dict(headers or {}).items()}
    return cls(status, ptype, str(doc.get("title") or f"HTTP {status}"), str(detail), errors,
               doc.get("instance"), hdrs, doc)
