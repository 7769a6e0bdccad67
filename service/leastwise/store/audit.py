"""Queries on the ``audit`` table (operator actions and refused attempts)."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import insert, select
from sqlalchemy.engine import Connection

from .tables import audit

__all__ = ["AuditEntry", "insert_audit", "list_audit"]


@dataclass(frozen=True, slots=True)
class AuditEntry:
    id: int
    at: float
    token_label: str | None
    action: str
    model: str | None
    version_before: int | None
    version_after: int | None
    outcome: str
    status: int
    detail: str | None


def insert_audit(conn: Connection, entry: AuditEntry) -> int:
    values = {k: getattr(entry, k) for k in ("at", "token_label", "action", "model", "version_before", "version_after",
                                             "outcome", "status", "detail")}
    if values["token_label"] is not None:
        values["token_label"] = values["token_label"][:200]
    if values["model"] is not None:
        values["model"] = values["model"][:128]
    if values["detail"] is not None:
        values["detail"] = values["detail"][:2000]
    values["action"] = values["action"][:64]
    return int(conn.execute(insert(audit).values(**values)).inserted_primary_key[0])


def list_audit(conn: Connection, *, model: str | None = None, action: str | None = None, since: float | None = None,
               until: float | None = None, outcome: str | None = None, limit: int = 100) -> list[AuditEntry]:
    """Newest first."""
    query = select(audit).order_by(audit.c.at.desc(), audit.c.id.desc()).limit(limit)
    if model is not None:
        query = query.where(audit.c.model == model)
    if action is not None:
        query = query.where(audit.c.action == action)
    if since is not None:
        query = query.where(audit.c.at >= since)
    if until is not None:
        query = query.where(audit.c.at < until)
    if outcome is not None:
        query = query.where(audit.c.outcome == outcome)
    return [AuditEntry(r.id, r.at, r.token_label, r.action, r.model, r.version_before, r.version_after, r.outcome,
                       r.status, r.detail) for r in conn.execute(query)]
