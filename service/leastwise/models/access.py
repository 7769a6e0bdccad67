"""Access control: bearer tokens, scopes, model-name patterns, and the audit trail.

Tokens
    ``lw_`` followed by 43 URL-safe base64 characters: 32 random bytes from
    :mod:`secrets` (256 bits of entropy). The service stores only the SHA-256
    digest (hex) of the whole token; the token itself is shown once, when it is
    made. A presented token is hashed and its digest compared with every
    active digest using :func:`hmac.compare_digest` (no early exit), so the
    comparison time does not depend on how much of a digest matched.

Scopes (each includes the ones before it)
    ``read``  list models, state, drift, covariance, predict, list snapshots
    ``write`` read + post observations
    ``admin`` everything: create/delete models, reset, snapshot, restore,
              delete snapshots, token management, audit

Model patterns
    A token may be limited to model names matching a pattern, matched with
    :func:`fnmatch.fnmatchcase` against the whole name, case-sensitively:
    ``*`` any run of characters (also none), ``?`` exactly one character,
    ``[abc]`` / ``[a-z]`` one character of the set, ``[!abc]`` one character
    not in it. Nothing else is special (model names contain no ``/``). For
    example ``plant-a-*`` matches ``plant-a-chiller-1`` but not
    ``Plant-a-1`` or ``plant-b-1``. No pattern (or ``*``) means every model.
    Token management and the audit listing need an admin token *without* a
    pattern: a limited admin could otherwise mint itself an unlimited token.

Audit
    Every operator action (create, config, delete, reset, snapshot,
    snapshot-delete, restore, drift-reference, token-create, token-revoke) and every request
    refused with 403 for an authenticated token is recorded with time, token
    label, model, the model's version before and after, outcome and status.
    The registry reports versions through :func:`note_versions`, which fills
    the :class:`AuditNote` of the current request (a context variable set by
    the API layer; outside a request it does nothing).
"""

from __future__ import annotations

import contextvars
import hashlib
import hmac
import re
import secrets
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from fnmatch import fnmatchcase
from typing import Any

from leastwise.store import Store
from leastwise.store import audit as audit_q
from leastwise.store import tokens as token_q

from .errors import FieldError, InvalidInput, NotFound

__all__ = [
    "SCOPES", "TOKEN_PREFIX", "TokenRecord", "AuditNote", "AccessControl", "scope_allows", "pattern_allows",
    "check_scope", "check_pattern", "check_label", "hash_token", "new_token", "note_versions", "note_detail",
    "current_note",
    "AUDIT_ACTIONS",
]

SCOPES = ("read", "write", "admin")
_RANK = {s: i for i, s in enumerate(SCOPES)}
TOKEN_PREFIX = "lw_"
TOKEN_BYTES = 32
#: the characters a presented token may have (RFC 6750 ``b64token``); anything else is refused unread
TOKEN_SYNTAX = re.compile(r"[A-Za-z0-9\-._~+/]+=*")
MAX_TOKEN_LENGTH = 256
PATTERN_SYNTAX = re.compile(r"[A-Za-z0-9._\-*?\[\]!]{1,200}")
MAX_LABEL = 200
#: operator actions recorded in the audit trail (refused requests use their route's action name too)
AUDIT_ACTIONS = ("create", "config", "delete", "reset", "snapshot", "snapshot-delete", "restore",
                 "drift-reference", "token-create", "token-revoke")


def new_token() -> str:
    """A fresh random token (256 bits of entropy)."""
    return TOKEN_PREFIX + secrets.token_urlsafe(TOKEN_BYTES)


def hash_token(token: str) -> str:
    """The stored form of a token: SHA-256, hex. (The token is high-entropy, so no salt or stretching is needed.)"""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def scope_allows(have: str, need: str) -> bool:
    return _RANK.get(have, -1) >= _RANK[need]


def pattern_allows(pattern: str | None, name: str) -> bool:
    return pattern is None or fnmatchcase(name, pattern)


def check_scope(scope: Any, where: str = "/scope") -> str:
    if scope not in SCOPES:
        raise InvalidInput(f"{where}: the scope must be one of read, write, admin",
                           [FieldError(where, "must be read, write or admin")])
    return scope


def check_pattern(pattern: Any, where: str = "/models") -> str | None:
    """``None`` (every model) or a valid pattern; ``"*"`` is stored as ``None``."""
    if pattern is None:
        return None
    if not isinstance(pattern, str) or not PATTERN_SYNTAX.fullmatch(pattern):
        reason = "must be a glob of 1-200 characters from A-Z a-z 0-9 . _ - * ? [ ] !"
        raise InvalidInput(f"{where}: {reason}", [FieldError(where, reason)])
    return None if pattern == "*" else pattern


def check_label(label: Any, where: str = "/label") -> str:
    if label is None:
        return ""
    if not isinstance(label, str) or len(label) > MAX_LABEL or any(ord(c) < 32 or ord(c) == 127 for c in label):
        reason = f"must be a string of at most {MAX_LABEL} printable characters"
        raise InvalidInput(f"{where}: {reason}", [FieldError(where, reason)])
    return label


@dataclass(frozen=True, slots=True)
class TokenRecord:
    id: int
    label: str
    scope: str
    models: str | None
    created: float
    revoked: float | None = None

    def allows(self, need: str, model: str | None = None) -> bool:
        return scope_allows(self.scope, need) and (model is None or pattern_allows(self.models, model))

    @property
    def unlimited(self) -> bool:
        return self.models is None

    def view(self) -> dict[str, Any]:
        from .views import rfc3339

        return {"id": self.id, "label": self.label, "scope": self.scope, "models": self.models,
                "created": rfc3339(self.created), "revoked": rfc3339(self.revoked)}


@dataclass(slots=True)
class AuditNote:
    """What one request did, filled while it runs; written to the audit table when it is answered."""

    action: str | None = None
    model: str | None = None
    version_before: int | None = None
    version_after: int | None = None
    detail: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)


_NOTE: contextvars.ContextVar[AuditNote | None] = contextvars.ContextVar("leastwise_audit_note", default=None)


def current_note() -> AuditNote | None:
    return _NOTE.get()


def set_note(note: AuditNote | None) -> contextvars.Token:
    return _NOTE.set(note)


def reset_note(token: contextvars.Token) -> None:
    _NOTE.reset(token)


def note_versions(before: int | None, after: int | None, *, action: str | None = None, detail: str | None = None) -> None:
    """Called by the registry at an operator action: the model's version before and after (no-op outside a request)."""
    note = _NOTE.get()
    if note is None:
        return
    note.version_before, note.version_after = before, after
    if action is not None:
        note.action = action
    if detail is not None:
        note.detail = detail


def note_detail(detail: str) -> None:
    """Add a detail to the current request's audit entry (no-op outside a request)."""
    note = _NOTE.get()
    if note is not None:
        note.detail = detail


class AccessControl:
    """Tokens and audit over one :class:`Store`. Thread-safe.

    Active tokens are cached in memory for ``cache_seconds`` (one small SELECT
    per period at most); changes made through this object take effect at once,
    changes by another process (the command line, another replica) within
    ``cache_seconds``.
    """

    def __init__(self, store: Store, *, cache_seconds: float = 1.0, clock: Callable[[], float] = time.time) -> None:
        self.store = store
        self.cache_seconds = cache_seconds
        self.clock = clock
        self._lock = threading.Lock()
        self._active: list[tuple[str, TokenRecord]] | None = None
        self._loaded = 0.0
        self._generation = 0  # bumped by invalidate(): a reload begun before a change is not kept

    # ------------------------------------------------------------ tokens
    def cached(self, max_age: float | None = None) -> list[tuple[str, TokenRecord]] | None:
        """The active tokens if loaded less than ``max_age`` seconds ago (default ``cache_seconds``), else
        ``None``; never touches the database. After :meth:`invalidate`, ``None`` until the next refresh."""
        age = self.cache_seconds if max_age is None else max_age
        with self._lock:
            if self._active is not None and time.monotonic() - self._loaded < age:
                return self._active
        return None

    @property
    def generation(self) -> int:
        """How many times the cache was invalidated (a change made through this object)."""
        return self._generation

    def refresh(self) -> list[tuple[str, TokenRecord]]:
        """Reload the active tokens from the database (cached unless a change was made meanwhile)."""
        generation, loaded, active = self._read_active()
        with self._lock:
            # a change made here while this read ran may be missing from it: the next request reloads
            if self._generation == generation:
                self._active, self._loaded = active, loaded
        return active

    def _read_active(self) -> tuple[int, float, list[tuple[str, TokenRecord]]]:
        """(the generation before the read, its time, the active tokens read)."""
        with self._lock:
            generation = self._generation
        loaded = time.monotonic()
        with self.store.read() as conn:
            rows = token_q.active_tokens(conn)
        return generation, loaded, [(r.digest, _record(r)) for r in rows]

    def _tokens(self) -> list[tuple[str, TokenRecord]]:
        active = self.cached()
        return active if active is not None else self.refresh()

    def invalidate(self) -> None:
        with self._lock:
            self._active = None
            self._generation += 1

    def enabled(self) -> bool:
        """True once any unrevoked token exists."""
        return bool(self._tokens())

    def authenticate(self, token: str, active: list[tuple[str, TokenRecord]] | None = None) -> TokenRecord | None:
        """The active token ``token`` stands for, or ``None``. Constant-time in the digests compared."""
        digest = hash_token(token)
        found = None
        for stored, record in (self._tokens() if active is None else active):
            if hmac.compare_digest(stored, digest):
                found = record
        return found

    def create_token(self, scope: Any, label: Any = None, models: Any = None) -> tuple[TokenRecord, str]:
        """A new token: (its record, the token itself — shown once, never stored)."""
        scope = check_scope(scope)
        label = check_label(label)
        pattern = check_pattern(models)
        token = new_token()
        now = self.clock()
        with self.store.write() as conn:
            row = token_q.insert_token(conn, label or f"{scope}-token", scope, pattern, hash_token(token), now)
        self.invalidate()
        return _record(row), token

    def list_tokens(self, include_revoked: bool = True) -> list[TokenRecord]:
        with self.store.read() as conn:
            return [_record(r) for r in token_q.list_tokens(conn, include_revoked=include_revoked)]

    def revoke_token(self, token_id: int) -> tuple[TokenRecord, bool]:
        """Revoke by id: (the record, whether it was active until now). Unknown id: :class:`NotFound`."""
        now = self.clock()
        with self.store.write() as conn:
            row = token_q.get_token(conn, token_id)
            if row is None:
                raise NotFound(f"no token with id {token_id}")
            changed = row.revoked is None
            if changed:
                token_q.revoke_token(conn, token_id, now)
                row = token_q.get_token(conn, token_id)
        self.invalidate()
        return _record(row), changed

    # ------------------------------------------------------------ audit
    def record(self, *, action: str, token_label: str | None, model: str | None = None,
               version_before: int | None = None, version_after: int | None = None,
               outcome: str = "ok", status: int = 200, detail: str | None = None) -> None:
        with self.store.write() as conn:
            audit_q.insert_audit(conn, audit_q.AuditEntry(
                id=0, at=self.clock(), token_label=token_label, action=action, model=model,
                version_before=version_before, version_after=version_after, outcome=outcome, status=status,
                detail=detail))

    def audit(self, *, model: str | None = None, action: str | None = None, since: float | None = None,
              until: float | None = None, outcome: str | None = None, limit: int = 100) -> list[dict[str, Any]]:
        from .views import rfc3339

        with self.store.read() as conn:
            rows = audit_q.list_audit(conn, model=model, action=action, since=since, until=until, outcome=outcome,
                                      limit=limit)
        return [{"id": r.id, "at": rfc3339(r.at), "token_label": r.token_label, "action": r.action, "model": r.model,
                 "version_before": r.version_before, "version_after": r.version_after, "outcome": r.outcome,
                 "status": r.status, "detail": r.detail} for r in rows]


def _record(row: Any) -> TokenRecord:
    return TokenRecord(row.id, row.label, row.scope, row.models, row.created, row.revoked)
