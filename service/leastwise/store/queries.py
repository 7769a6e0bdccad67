"""Queries on the leastwise tables. Plain data in, plain data out; no maths here."""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
import functools
from dataclasses import dataclass
from typing import Any, NamedTuple

from sqlalchemy import bindparam, delete, func, insert, select, update
from sqlalchemy.engine import Connection

from .tables import checkpoints, idempotency_keys, models, observations, snapshots

__all__ = [
    "ModelRow", "LogRow", "CheckpointRow", "SnapshotRow", "PendingWrite",
    "insert_model", "model_by_name", "MODEL_VERSION", "list_models", "lock_model", "delete_model", "bump_model",
    "latest_checkpoint", "insert_checkpoint", "log_after", "find_keys", "find_keys_many", "write_pending",
    "insert_snapshot", "list_snapshots", "get_snapshot", "delete_snapshot", "compact",
]


@dataclass(frozen=True, slots=True)
class ModelRow:
    id: int
    name: str
    config: str
    version: int
    seq: int
    epoch: int
    created: float


class LogRow(NamedTuple):
    """One logged observation (immutable).

    A named tuple, not a frozen dataclass like the other rows: one is built per
    observation on the write path, and a frozen dataclass's ``__init__`` costs
    ~0.9 us against ~0.3.
    """

    seq: int
    x: bytes
    y: float
    t: float | None
    key: str | None
    status: str = "applied"
    received: float = 0.0
    #: seq of the first row of the block the engine absorbed this row with; None: on its own
    block: int | None = None


@dataclass(frozen=True, slots=True)
class CheckpointRow:
    version: int
    seq: int
    state: bytes
    drift: bytes


@dataclass(frozen=True, slots=True)
class SnapshotRow:
    id: int
    model_id: int
    label: str | None
    created: float
    version: int
    n: int
    state: bytes | None = None
    drift: bytes | None = None


@dataclass(slots=True)
class PendingWrite:
    """Everything one request adds to one model, prepared before the transaction.

    :func:`write_pending` applies a list of them in one transaction, so the
    commits of many requests can be grouped. ``expected_version`` is the
    version the rows were computed from; a write whose model moved on is
    rejected (``accepted = False``) and must be recomputed.
    """

    model_id: int
    expected_version: int
    new_version: int
    new_seq: int
    rows: Sequence[LogRow]
    checkpoint: CheckpointRow | None = None
    new_epoch: int | None = None
    compact: bool = False
    accepted: bool = False
    #: drift status changes caused by these rows (dicts, see store/drift.py), written in the same transaction
    drift_events: Sequence[dict] = ()


def _model(row) -> ModelRow:  # noqa: ANN001
    return ModelRow(row.id, row.name, row.config, row.version, row.seq, row.epoch, row.created)


def insert_model(conn: Connection, name: str, config: str, created: float, checkpoint: CheckpointRow) -> ModelRow:
    result = conn.execute(
        insert(models).values(name=name, config=config, version=checkpoint.version, seq=checkpoint.seq, epoch=0, created=created)
    )
    model_id = int(result.inserted_primary_key[0])
    insert_checkpoint(conn, model_id, checkpoint, created)
    return ModelRow(model_id, name, config, checkpoint.version, checkpoint.seq, 0, created)


def model_by_name(conn: Connection, name: str) -> ModelRow | None:
    row = conn.execute(select(models).where(models.c.name == name)).first()
    return _model(row) if row is not None else None


#: ``(id, version, epoch)`` of the model named ``:name``: the read path's version check (run by
#: :meth:`leastwise.store.Store.model_version`, compiled once per store)
# (id, version, epoch, created): ``created`` tells a re-created model from the old one when
# SQLite hands out a deleted row's id again.
MODEL_VERSION = select(models.c.id, models.c.version, models.c.epoch, models.c.created).where(
    models.c.name == bindparam("name")
)


def list_models(conn: Connection) -> list[ModelRow]:
    return [_model(r) for r in conn.execute(select(models).order_by(models.c.name))]


def lock_model(conn: Connection, model_id: int) -> ModelRow | None:
    """The model row, locked for the rest of the transaction (``FOR UPDATE``; SQLite locks the database)."""
    row = conn.execute(select(models).where(models.c.id == model_id).with_for_update()).first()
    return _model(row) if row is not None else None


def bump_model(conn: Connection, model_id: int, version: int, seq: int, epoch: int | None = None) -> None:
    values = {"version": version, "seq": seq}
    if epoch is not None:
        values["epoch"] = epoch
    conn.execute(update(models).where(models.c.id == model_id).values(**values))


def delete_model(conn: Connection, model_id: int) -> None:
    """Remove the model and everything recorded for it."""
    for table in (idempotency_keys, snapshots, checkpoints, observations):
        conn.execute(delete(table).where(table.c.model_id == model_id))
    conn.execute(delete(models).where(models.c.id == model_id))


def latest_checkpoint(conn: Connection, model_id: int) -> CheckpointRow | None:
    row = conn.execute(
        select(checkpoints.c.version, checkpoints.c.seq, checkpoints.c.state, checkpoints.c.drift)
        .where(checkpoints.c.model_id == model_id)
        .order_by(checkpoints.c.version.desc())
        .limit(1)
    ).first()
    return CheckpointRow(row.version, row.seq, bytes(row.state), bytes(row.drift)) if row is not None else None


def insert_checkpoint(conn: Connection, model_id: int, cp: CheckpointRow, created: float) -> None:
    conn.execute(
        insert(checkpoints).values(
            model_id=model_id, version=cp.version, seq=cp.seq, state=cp.state, drift=cp.drift, created=created
        )
    )


def log_after(conn: Connection, model_id: int, seq: int, upto: int | None = None) -> Iterator[LogRow]:
    """Applied log rows with ``seq > seq`` (and ``<= upto``), in order."""
    query = (
        select(observations.c.seq, observations.c.x, observations.c.y, observations.c.t, observations.c.key,
               observations.c.block)
        .where(observations.c.model_id == model_id, observations.c.seq > seq, observations.c.status == "applied")
        .order_by(observations.c.seq)
    )
    if upto is not None:
        query = query.where(observations.c.seq <= upto)
    for seq_, x, y, t, key, block in conn.execute(query):  # unpacked: ``Row.t`` is a Row attribute, not the column
        yield LogRow(seq_, bytes(x), y, t, key, block=block)


def find_keys(conn: Connection, model_id: int, keys: Iterable[str]) -> dict[str, int]:
    """The keys among ``keys`` already recorded for the model, with the log seq they were applied at."""
    return {key: seq for (_mid, key), seq in find_keys_many(conn, ((model_id, k) for k in keys)).items()}


class _Raw:
    """Hot statements run on the DBAPI cursor of the caller's SQLAlchemy connection (same transaction).

    The write path of every observation runs these; SQLAlchemy's per-row
    parameter processing costs tens of microseconds per statement and several
    per row, while the driver's ``executemany`` with plain tuples costs a few.
    The SQL is written once with ``?`` markers and rewritten for drivers that
    use ``%s`` (psycopg). Driver errors are raised as SQLAlchemy's own
    exception types, so callers catch one family.
    """

    __slots__ = ("conn", "cursor", "marker", "postgres")

    def __init__(self, conn: Connection) -> None:
        self.conn = conn
        self.postgres = conn.dialect.name == "postgresql"
        self.marker = "%s" if conn.dialect.paramstyle in ("format", "pyformat") else "?"
        self.cursor = conn.connection.driver_connection.cursor()

    def _sql(self, sql: str) -> str:
        return sql if self.marker == "?" else sql.replace("?", self.marker)

    def execute(self, sql: str, params: Sequence[Any] = ()) -> list[tuple]:
        sql = self._sql(sql)
        try:
            self.cursor.execute(sql, params)
            return self.cursor.fetchall() if self.cursor.description is not None else []
        except self.conn.dialect.loaded_dbapi.Error as exc:
            raise _wrap(sql, params, exc) from exc

    def executemany(self, sql: str, rows: Sequence[Sequence[Any]]) -> None:
        sql = self._sql(sql)
        try:
            self.cursor.executemany(sql, rows)
        except self.conn.dialect.loaded_dbapi.Error as exc:
            raise _wrap(sql, rows[:1], exc) from exc

    def insert_many(self, head: str, rows: Sequence[Sequence[Any]]) -> None:
        """``head VALUES (...), (...), ...``: many rows per statement, at most 999 values each.

        Not ``executemany``: sqlite3 lets go of the interpreter lock at every row's step,
        and winning it back from the busy event loop can take a switch interval (5 ms)
        each time; one statement per chunk lets go once. 999 values is the smallest
        limit SQLite builds have had.
        """
        width = len(rows[0])
        per = max(1, 999 // width)
        for start in range(0, len(rows), per):
            chunk = rows[start:start + per]
            sql = _values_sql(head, width, len(chunk), self.marker)
            params = [v for row in chunk for v in row]
            try:
                self.cursor.execute(sql, params)
            except self.conn.dialect.loaded_dbapi.Error as exc:
                raise _wrap(sql, chunk[:1], exc) from exc

    def close(self) -> None:
        self.cursor.close()


@functools.lru_cache(maxsize=256)
def _values_sql(head: str, width: int, count: int, marker: str) -> str:
    row = "(" + ",".join([marker] * width) + ")"
    return f"{head} VALUES " + ",".join([row] * count)


def _wrap(sql: str, params: Any, exc: Exception) -> Exception:
    from sqlalchemy import exc as sa_exc

    return sa_exc.DBAPIError.instance(sql, params, exc, Exception)


def find_keys_many(conn: Connection, pairs: Iterable[tuple[int, str]]) -> dict[tuple[int, str], int]:
    """``find_keys`` for many models at once: ``{(model_id, key): seq}`` for the pairs already recorded.

    Pairs of several models: one statement per 400 pairs on both databases (on
    SQLite a join from the wanted pairs, which it runs as one primary-key search
    each: 15 pairs of 15 models in 45 us against 103 us for one statement per
    model, measured). Pairs of one model: one ``key IN (...)`` per 400 keys.
    """
    wanted = list(dict.fromkeys(pairs))
    found: dict[tuple[int, str], int] = {}
    if not wanted:
        return found
    raw = _Raw(conn)
    try:
        if len({m for m, _ in wanted}) > 1:
            for start in range(0, len(wanted), 400):
                chunk = wanted[start : start + 400]
                marks = ",".join(["(?,?)"] * len(chunk))
                # SQLite: CROSS JOIN keeps the wanted pairs the outer loop, so each is one
                # primary-key search (its planner scans the table for a row-value IN).
                sql = ("SELECT model_id, key, seq FROM idempotency_keys WHERE (model_id, key) IN "
                       f"(SELECT * FROM (VALUES {marks}) AS wanted)" if raw.postgres else
                       f"WITH wanted(m, k) AS (VALUES {marks}) SELECT i.model_id, i.key, i.seq "
                       "FROM wanted CROSS JOIN idempotency_keys AS i ON i.model_id = wanted.m AND i.key = wanted.k")
                for mid, key, seq in raw.execute(sql, [v for pair in chunk for v in pair]):
                    found[(int(mid), key)] = int(seq)
            return found
        mid = wanted[0][0]
        keys = [key for _, key in wanted]
        for start in range(0, len(keys), 400):
            chunk = keys[start : start + 400]
            marks = ",".join("?" * len(chunk))
            for key, seq in raw.execute(
                f"SELECT key, seq FROM idempotency_keys WHERE model_id = ? AND key IN ({marks})", [mid, *chunk]
            ):
                found[(mid, key)] = int(seq)
    finally:
        raw.close()
    return found


_INSERT_LOG = "INSERT INTO observations (model_id, seq, x, y, t, key, status, received, block)"
_INSERT_KEY = "INSERT INTO idempotency_keys (model_id, key, seq)"
_BUMP = "UPDATE models SET version = ?, seq = ? WHERE id = ?"


def write_pending(conn: Connection, writes: Sequence[PendingWrite], now: float) -> None:
    """Apply prepared writes inside the caller's transaction.

    Each model row is locked and its version compared with the write's
    ``expected_version``; a stale write is skipped (``accepted`` stays False).
    Several writes to one model chain in order (each expects the version the
    previous one sets). The rows of all accepted writes go in with one
    ``executemany`` per table on the driver's cursor (:class:`_Raw`) and one
    batched version update, so a group of many requests costs a handful of
    statements; drift events go in the same way (with posts spread over many
    models a status change is not rare: a model's first posts move it out of its
    warm-up); checkpoints and epoch changes (rare) take the SQLAlchemy queries in
    the same transaction.
    """
    if not writes:
        return
    ids = sorted({w.model_id for w in writes})  # sorted: concurrent groups lock rows in one order
    current: dict[int, int] = {}
    raw = _Raw(conn)
    try:
        lock = " ORDER BY id FOR UPDATE" if raw.postgres else ""  # SQLite: BEGIN IMMEDIATE holds the lock
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            marks = ",".join("?" * len(chunk))
            for mid, version in raw.execute(f"SELECT id, version FROM models WHERE id IN ({marks}){lock}", chunk):
                current[int(mid)] = int(version)
        log_rows: list[tuple] = []
        key_rows: list[tuple] = []
        final: dict[int, PendingWrite] = {}
        for w in writes:
            if current.get(w.model_id) != w.expected_version:
                w.accepted = False
                continue
            mid = w.model_id
            for r in w.rows:
                log_rows.append((mid, *r))  # LogRow's fields are the log's columns after model_id, in order
                if r.key is not None:
                    key_rows.append((mid, r.key, r.seq))
            current[mid] = w.new_version
            final[mid] = w
            w.accepted = True
        if log_rows:
            raw.insert_many(_INSERT_LOG, log_rows)
        if key_rows:
            raw.insert_many(_INSERT_KEY, key_rows)
        from . import drift  # drift.py imports this module

        event_rows: list[tuple] = []
        for w in writes:
            if w.accepted and w.checkpoint is not None:
                insert_checkpoint(conn, w.model_id, w.checkpoint, now)
                if w.compact:
                    compact(conn, w.model_id)
            if w.accepted and w.drift_events:
                event_rows += drift.event_rows(w.model_id, w.drift_events, now)
        if event_rows:
            raw.insert_many(drift.INSERT_EVENTS, event_rows)
        plain = [(w.new_version, w.new_seq, w.model_id) for w in final.values() if w.new_epoch is None]
        if plain:
            raw.executemany(_BUMP, plain)
    finally:
        raw.close()
    for w in final.values():
        if w.new_epoch is not None:
            bump_model(conn, w.model_id, w.new_version, w.new_seq, w.new_epoch)


def compact(conn: Connection, model_id: int | None = None) -> int:
    """Delete log rows and checkpoints no longer needed for recovery (below each model's newest checkpoint).

    Keys stay in ``idempotency_keys``; snapshots keep their own state. Returns
    the number of log rows removed.
    """
    removed = 0
    ids = [model_id] if model_id is not None else [r.id for r in conn.execute(select(models.c.id))]
    for mid in ids:
        cp = latest_checkpoint(conn, mid)
        if cp is None:
            continue
        removed += conn.execute(
            delete(observations).where(observations.c.model_id == mid, observations.c.seq <= cp.seq)
        ).rowcount or 0
        conn.execute(delete(checkpoints).where(checkpoints.c.model_id == mid, checkpoints.c.version < cp.version))
    return removed


def insert_snapshot(conn: Connection, model_id: int, label: str | None, created: float, version: int, n: int,
                    state: bytes, drift: bytes) -> SnapshotRow:
    result = conn.execute(
        insert(snapshots).values(model_id=model_id, label=label, created=created, version=version, n=n, state=state, drift=drift)
    )
    return SnapshotRow(int(result.inserted_primary_key[0]), model_id, label, created, version, n)


def list_snapshots(conn: Connection, model_id: int) -> list[SnapshotRow]:
    rows = conn.execute(
        select(snapshots.c.id, snapshots.c.model_id, snapshots.c.label, snapshots.c.created, snapshots.c.version, snapshots.c.n)
        .where(snapshots.c.model_id == model_id)
        .order_by(snapshots.c.id)
    )
    return [SnapshotRow(r.id, r.model_id, r.label, r.created, r.version, r.n) for r in rows]


def get_snapshot(conn: Connection, model_id: int, snapshot_id: int) -> SnapshotRow | None:
    r = conn.execute(select(snapshots).where(snapshots.c.model_id == model_id, snapshots.c.id == snapshot_id)).first()
    if r is None:
        return None
    return SnapshotRow(r.id, r.model_id, r.label, r.created, r.version, r.n, bytes(r.state), bytes(r.drift))


def delete_snapshot(conn: Connection, model_id: int, snapshot_id: int) -> bool:
    result = conn.execute(delete(snapshots).where(snapshots.c.model_id == model_id, snapshots.c.id == snapshot_id))
    return (result.rowcount or 0) > 0


def count_log(conn: Connection, model_id: int) -> int:
    return int(conn.execute(select(func.count()).select_from(observations).where(observations.c.model_id == model_id)).scalar_one())
