"""Errors of the registry. The API maps each to an RFC 9457 problem with a 4xx status."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["FieldError", "RegistryError", "InvalidInput", "NotFound", "Conflict", "Busy"]


@dataclass(frozen=True, slots=True)
class FieldError:
    """One rejected field: a JSON pointer (RFC 6901) into the request body and the reason."""

    pointer: str
    reason: str


def pointer(*parts: str | int) -> str:
    """JSON pointer from path parts, escaping ``~`` and ``/``."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


class RegistryError(Exception):
    """Base class: the request was refused and nothing changed."""

    status = 400
    slug = "bad-request"
    title = "Bad request"

    def __init__(self, detail: str, errors: list[FieldError] | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = list(errors or [])


class InvalidInput(RegistryError):
    status = 422
    slug = "invalid-input"
    title = "Invalid input"

    @classmethod
    def at(cls, where: str, reason: str) -> "InvalidInput":
        return cls(f"{where or '/'}: {reason}", [FieldError(where, reason)])


class NotFound(RegistryError):
    status = 404
    slug = "not-found"
    title = "Not found"


class Conflict(RegistryError):
    status = 409
    slug = "conflict"
    title = "Conflict"


class Busy(RegistryError):
    """The model kept changing under us (another process); the client may retry."""

    status = 409
    slug = "busy"
    title = "Model busy"
