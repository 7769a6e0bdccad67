"""Queries on ``drift_events`` and ``drift_references``, and the log rows drift replay needs. No maths here."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Any

import orjson
from sqlalchemy import delete, insert, select
from sqlalchemy.engine import Connection

from .queries import CheckpointRow, LogRow, _Raw
from .tables import checkpoints, drift_events, drift_references, observations

__all__ = ["insert_events", "event_rows", "INSERT_EVENTS", "list_events", "set_reference", "get_reference", "log_rows_after", "checkpoint_at", "LOGGED"]

#: Log statuses replayed on load: applied observations and gated ones (logged, not applied).
LOGGED = ("applied", "gated")


def _num(v: Any) -> float | None:
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None


#: The insert of :func:`event_rows`, as multi-row statements on the driver's cursor (``queries._Raw``).
INSERT_EVENTS = ("INSERT INTO drift_events (model_id, at, seq, status, statistic, value, threshold, since_seq, "
                 "detail)")


def event_rows(model_id: int, events: Sequence[dict[str, Any]], at: float) -> list[tuple]:
    """Rows of ``drift_events`` (in :data:`INSERT_EVENTS`' column order) for drift events
    (dicts with seq, status, statistic, value, threshold, since and any detail)."""
    rows = []
    for e in events:
        detail = {k: v for k, v in e.items() if k not in ("seq", "status", "statistic", "value", "threshold", "since")}
        rows.append((model_id, float(e.get("at", at)), int(e["seq"]), str(e["status"])[:16], str(e["statistic"])[:64],
                     _num(e.get("value")), _num(e.get("threshold")),
                     int(e["since"]) if isinstance(e.get("since"), int) else None,
                     orjson.dumps(detail).decode() if detail else None))
    return rows


def insert_events(conn: Connection, model_id: int, events: Sequence[dict[str, Any]], at: float) -> None:
    """Append drift events (see :func:`event_rows`)."""
    if events:
        raw = _Raw(conn)
        try:
            raw.insert_many(INSERT_EVENTS, event_rows(model_id, events, at))
        finally:
            raw.close()


def list_events(conn: Connection, model_id: int, *, after: int = 0, limit: int = 100,
                status: str | None = None) -> list[dict[str, Any]]:
    """Events with ``id > after`` in order, at most ``limit``; optionally only one status."""
    query = select(drift_events).where(drift_events.c.model_id == model_id, drift_events.c.id > after)
    if status is not None:
        query = query.where(drift_events.c.status == status)
    out = []
    for r in conn.execute(query.order_by(drift_events.c.id).limit(limit)):
        out.append({"id": r.id, "at": r.at, "seq": r.seq, "status": r.status, "statistic": r.statistic,
                    "value": r.value, "threshold": r.threshold, "since": r.since_seq,
                    "detail": orjson.loads(r.detail) if r.detail else None})
    return out


def set_reference(conn: Connection, model_id: int, kind: str, snapshot_id: int | None, seq: int, version: int,
                  at: float) -> None:
    """Record the model's current reference point (one row per model)."""
    conn.execute(delete(drift_references).where(drift_references.c.model_id == model_id))
    conn.execute(insert(drift_references).values(model_id=model_id, kind=kind, snapshot_id=snapshot_id, seq=seq,
                                                 version=version, at=at))


def get_reference(conn: Connection, model_id: int) -> dict[str, Any] | None:
    r = conn.execute(select(drift_references).where(drift_references.c.model_id == model_id)).first()
    if r is None:
        return None
    return {"kind": r.kind, "snapshot": r.snapshot_id, "seq": r.seq, "version": r.version, "at": r.at}


def log_rows_after(conn: Connection, model_id: int, seq: int, upto: int | None = None) -> Iterator[LogRow]:
    """Logged rows (applied and gated) with ``seq > seq`` (and ``<= upto``), in order, with their status."""
    c = observations.c
    query = (select(c.seq, c.x, c.y, c.t, c.key, c.status, c.block)
             .where(c.model_id == model_id, c.seq > seq, c.status.in_(LOGGED)).order_by(c.seq))
    if upto is not None:
        query = query.where(c.seq <= upto)
    for seq_, x, y, t, key, status, block in conn.execute(query):
        yield LogRow(seq_, bytes(x), y, t, key, status, block=block)


def checkpoint_at(conn: Connection, model_id: int, version: int) -> CheckpointRow | None:
    """The checkpoint written at exactly ``version``, if it is still kept."""
    c = checkpoints.c
    row = conn.execute(select(c.version, c.seq, c.state, c.drift)
                       .where(c.model_id == model_id, c.version == version)).first()
    return CheckpointRow(row.version, row.seq, bytes(row.state), bytes(row.drift)) if row is not None else None
