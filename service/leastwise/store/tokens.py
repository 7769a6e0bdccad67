"""Queries on the ``tokens`` table (bearer tokens, stored only as SHA-256 digests)."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import func, insert, select, update
from sqlalchemy.engine import Connection

from .tables import tokens

__all__ = ["TokenRow", "insert_token", "active_tokens", "list_tokens", "get_token", "revoke_token", "count_active"]


@dataclass(frozen=True, slots=True)
class TokenRow:
    id: int
    label: str
    scope: str
    models: str | None
    digest: str
    created: float
    revoked: float | None


def _row(r) -> TokenRow:  # noqa: ANN001
    return TokenRow(r.id, r.label, r.scope, r.models, r.digest, r.created, r.revoked)


def insert_token(conn: Connection, label: str, scope: str, models: str | None, digest: str, created: float) -> TokenRow:
    result = conn.execute(insert(tokens).values(label=label, scope=scope, models=models, digest=digest, created=created))
    return TokenRow(int(result.inserted_primary_key[0]), label, scope, models, digest, created, None)


def active_tokens(conn: Connection) -> list[TokenRow]:
    return [_row(r) for r in conn.execute(select(tokens).where(tokens.c.revoked.is_(None)).order_by(tokens.c.id))]


def list_tokens(conn: Connection, *, include_revoked: bool = True) -> list[TokenRow]:
    query = select(tokens).order_by(tokens.c.id)
    if not include_revoked:
        query = query.where(tokens.c.revoked.is_(None))
    return [_row(r) for r in conn.execute(query)]


def get_token(conn: Connection, token_id: int) -> TokenRow | None:
    r = conn.execute(select(tokens).where(tokens.c.id == token_id)).first()
    return _row(r) if r is not None else None


def revoke_token(conn: Connection, token_id: int, at: float) -> bool:
    result = conn.execute(update(tokens).where(tokens.c.id == token_id, tokens.c.revoked.is_(None)).values(revoked=at))
    return (result.rowcount or 0) > 0


def count_active(conn: Connection) -> int:
    return int(conn.execute(select(func.count()).select_from(tokens).where(tokens.c.revoked.is_(None))).scalar_one())
