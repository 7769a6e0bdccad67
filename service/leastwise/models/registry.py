"""The registry: one live engine state per model, kept in memory and made durable in the store.

Write path (observations)::

    validate (outside any lock)
    -> per-model lock
    -> look up keys already recorded (duplicates are answered, not applied)
    -> compute the engine updates on a *copy* of the live state (residuals for the answer)
    -> one transaction: lock the model row, check its version is the one the
       copy was made from, append log rows and keys, maybe a checkpoint, bump the version
    -> commit -> the copy becomes the live state -> answer

The copy never touches memory if the commit fails. A version mismatch means
another process wrote: the live state catches up (log replay, or the newest
checkpoint plus replay after a reset/restore) and the request is recomputed.
:func:`leastwise.store.queries.write_pending` takes a *list* of prepared
writes so commits of many requests can be grouped into one transaction later.

Reads validate the in-memory version against the model row (one small
pre-compiled SELECT, :meth:`Store.model_version`) and catch up the same way,
so several processes sharing one PostgreSQL database see each other's changes.
The GET body is built once per version and kept on the live model (see
:meth:`LiveModel.get_body`).

Replays are bit-exact: the live path and replay apply the same rows with the
same engine calls (``State.update``, or ``State.update_block`` for the rows the
log marks as one block) to states whose reads leave no trace in them.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

import anyio.to_thread
import numpy as np
from sqlalchemy.exc import IntegrityError

from leastwise.engine import State, Step
from leastwise.store import CheckpointRow, LogRow, PendingWrite, Store
from leastwise.store import queries as q
from leastwise.store import drift as drift_store

from .access import note_detail, note_versions
from .config import ModelConfig, check_model_name
from . import drift as drift_hooks
from .drift import ResidualMonitor
from .errors import Busy, Conflict, InvalidInput, NotFound
from .inputs import Observation, parse_observations, parse_predict
from .tally import ObservationTally, RegistryStats
from .views import by_name, covariance_view, prediction_view, rfc3339, state_view, step_view
from .writer import GroupWriter, Ticket, commit_group, debug_commit_delay

__all__ = ["Registry", "LiveModel"]

log = logging.getLogger("leastwise.models")

_RETRIES = 8


class _Stale(Exception):
    """The model row moved on since the live state was loaded."""


@dataclass(slots=True)
class _Prepared:
    state: State
    monitor: ResidualMonitor
    results: list[dict[str, Any]]
    pending: PendingWrite | None


@dataclass(slots=True)
class LiveModel:
    """The in-memory state of one model, valid for ``(id, version)``."""

    id: int
    name: str
    config: ModelConfig
    created: float
    state: State
    monitor: ResidualMonitor
    version: int
    seq: int
    epoch: int
    checkpoint_seq: int
    checkpoint_version: int
    view: State | None = None  # a copy with its solution cached, for reads at ``version``
    #: the GET body and ETag, with what they were built from (see ``get_body``)
    body: tuple[Any, ...] | None = None

    def read_view(self) -> State:
        # The live state is never updated in place (every write works on a copy and swaps it in),
        # so it serves as its own read view: its solution is computed once per version.
        if self.view is None:
            self.view = self.state
        return self.view

    def etag(self) -> str:
        return f'"{self.id}.{self.version}"'

    def get_body(self) -> tuple[dict[str, Any], str]:
        """The ``GET /v1/models/{name}`` body and ETag, built once per version (the caller must not mutate it).

        The cache is keyed on the version and epoch and on the *identity* of the
        state, monitor and config objects: every change (observe, catch-up,
        reset, restore, drift reference move, reload after a delete and
        re-create) swaps in new objects or a new version, and none of them is
        changed in place while live, so any change invalidates the body.
        """
        c = self.body
        if (c is not None and c[0] == self.version and c[1] == self.epoch and c[2] is self.state
                and c[3] is self.monitor and c[4] is self.config):
            return c[5], c[6]
        state, monitor, config = self.state, self.monitor, self.config
        out = {
            "name": self.name,
            "config": config.to_dict(),
            "version": self.version,
            "created": rfc3339(self.created),
            **state_view(config, self.read_view()),
            "drift": monitor.status(),
        }
        etag = self.etag()
        self.body = (self.version, self.epoch, state, monitor, config, out, etag)
        return out, etag


@dataclass(slots=True)
class _Entry:
    lock: threading.Lock = field(default_factory=threading.Lock)
    live: LiveModel | None = None




@dataclass(slots=True)
class _Job:
    """One observation request queued for the group writer."""

    entry: _Entry
    model_id: int
    config: ModelConfig
    observations: list[Observation]
    state: State | None = None
    results: list[dict[str, Any]] | None = None
    applied: int = 0
    version: int = 0
    answer: dict[str, Any] | None = None  # built on the event loop while the commit is in flight
    minimal: bool = False  # the answer leaves out the model's coefficients (Prefer: return=minimal)


@dataclass(slots=True)
class _Tip:
    """The newest prepared (not yet committed) state of one model inside a group."""

    live: LiveModel
    state: State
    monitor: ResidualMonitor
    base_version: int
    version: int
    seq: int
    checkpoint_seq: int
    last_time: float | None  # of the last observation admitted so far
    admitted: list["_Admitted"] = field(default_factory=list)
    rows: list[LogRow] = field(default_factory=list)
    jobs: list[Ticket] = field(default_factory=list)
    write: PendingWrite | None = None


#: An observation admitted for applying: (its request's results, its index there, the observation, t, seq).
_Admitted = tuple[list[dict[str, Any]], int, Observation, "float | None", int]
_PLACEHOLDER: dict[str, Any] = {}  # a result slot until the observation is applied


def _x_bytes(row: np.ndarray) -> bytes:
    return np.asarray(row, dtype="<f8").tobytes()


def _x_row(data: bytes) -> np.ndarray:
    return np.frombuffer(data, dtype="<f8")


class Registry:
    """All models of one database. Thread-safe; every public method raises ``RegistryError`` subclasses for client errors."""

    def __init__(
        self,
        store: Store,
        *,
        checkpoint_every: int = 1000,
        compact_log: bool = False,
        max_batch: int = 10_000,
        clock: Callable[[], float] = time.time,
        group_commit: bool = True,
        max_group: int = 256,
        group_gather: float = 0.0005,
    ) -> None:
        self.store = store
        #: share one transaction among the observation requests that queue up (see writer.py)
        self.group_commit = group_commit
        self.max_group = max_group
        self.group_gather = group_gather  # seconds (see writer.py, gathering)
        self._writer: GroupWriter | None = None
        self._writer_guard = threading.Lock()
        self._commit_delay = debug_commit_delay()
        self.checkpoint_every = checkpoint_every
        self.compact_log = compact_log
        self.max_batch = max_batch
        self.clock = clock
        self._entries: dict[str, _Entry] = {}
        self._guard = threading.Lock()
        #: committed observations by result status (for the metrics)
        self.observations = ObservationTally()

    # ------------------------------------------------------------ plumbing
    def close(self) -> None:
        """Stop the writer thread (pending requests are answered first) and close the store."""
        with self._writer_guard:
            writer, self._writer = self._writer, None
        if writer is not None:
            writer.close()
        self.store.close()

    def stats(self) -> RegistryStats:
        """Counts for the metrics, from memory only: loaded models, their drift levels, the writer's groups."""
        with self._guard:
            entries = list(self._entries.values())
        levels: dict[str, int] = {}
        loaded = 0
        for entry in entries:
            live = entry.live  # read without the model's lock: a scrape may see the version before or after a write
            if live is None:
                continue
            loaded += 1
            level = live.monitor.level
            levels[level] = levels.get(level, 0) + 1
        writer = self._writer
        return RegistryStats(loaded, levels, self.observations.snapshot(),
                             writer.stats() if writer is not None else None, self.store.engine.dialect.name)

    def _group_writer(self) -> GroupWriter:
        writer = self._writer
        if writer is None:
            with self._writer_guard:
                if self._writer is None:
                    self._writer = GroupWriter(self._run_group, max_group=self.max_group,
                                               gather_wait=self.group_gather, after_group=self.store.between_writes)
                writer = self._writer
        return writer

    def _entry(self, name: str) -> _Entry:
        check_model_name(name)
        with self._guard:
            entry = self._entries.get(name)
            if entry is None:
                entry = self._entries[name] = _Entry()
            return entry

    def _load(self, row: q.ModelRow, conn: Any) -> LiveModel:
        """Newest checkpoint at or below the row's version plus replay of the log after it."""
        config = ModelConfig.from_json(row.config)
        cp = q.latest_checkpoint(conn, row.id)
        if cp is None:  # pragma: no cover - every model is created with one
            raise RuntimeError(f"model {row.name!r} has no checkpoint")
        state = State.from_bytes(cp.state)
        monitor = ResidualMonitor.from_bytes(cp.drift, config.forgetting)
        last = drift_hooks.replay(state, monitor, drift_store.log_rows_after(conn, row.id, cp.seq, upto=row.seq),
                                  _x_row) or cp.seq
        if last != row.seq:
            log.warning("log gap while loading", extra={"model": row.name, "expected_seq": row.seq, "seq": last})
        return LiveModel(row.id, row.name, config, row.created, state, monitor, row.version, row.seq, row.epoch,
                         cp.seq, cp.version)

    def _catch_up(self, live: LiveModel, row: q.ModelRow, conn: Any) -> LiveModel:
        """Bring ``live`` to ``row``'s version: replay the new log rows, or reload after a reset/restore."""
        if row.id != live.id or row.epoch != live.epoch or row.seq < live.seq:
            return self._load(row, conn)
        state = live.state.copy()
        monitor = live.monitor.copy()
        drift_hooks.replay(state, monitor, drift_store.log_rows_after(conn, row.id, live.seq, upto=row.seq), _x_row)
        live.state, live.monitor, live.view = state, monitor, None
        live.version, live.seq = row.version, row.seq
        return live

    def _current(self, entry: _Entry, name: str) -> LiveModel:
        """The live model, validated against the stored version (caller holds ``entry.lock``)."""
        live = entry.live
        if live is not None:
            # the quick check: one pre-compiled SELECT of (id, version, epoch, created); anything else takes the full path
            seen = self.store.model_version(name)
            if (seen is not None and seen[0] == live.id and seen[1] == live.version and seen[2] == live.epoch
                    and seen[3] == live.created):
                return live
        with self.store.read() as conn:
            row = q.model_by_name(conn, name)
            if row is None:
                entry.live = None
                raise NotFound(f"no model named {name!r}")
            live = entry.live
            if live is None or live.id != row.id or live.created != row.created:
                live = self._load(row, conn)  # first use, or the name now belongs to a re-created model
            elif live.id != row.id or live.version != row.version:
                live = self._catch_up(live, row, conn)
        entry.live = live
        return live

    def _cached(self, entry: _Entry, name: str) -> LiveModel:
        """The live model without a version check (the write transaction checks it)."""
        return entry.live if entry.live is not None else self._current(entry, name)

    # ------------------------------------------------------------ models
    def create(self, name: str, body: Any) -> tuple[dict[str, Any], bool]:
        """Create a model; returns (description, created). Same config again: not created; different: 409."""
        check_model_name(name)
        config = ModelConfig.parse(body)
        spec = config.spec()
        entry = self._entry(name)
        with entry.lock:
            for _ in range(_RETRIES):
                try:
                    with self.store.write() as conn:
                        row = q.model_by_name(conn, name)
                        if row is not None:
                            existing = ModelConfig.from_json(row.config)
                            note_versions(row.version, row.version, action="config",
                                          detail=None if existing != config else "same configuration, unchanged")
                            if existing != config:
                                raise Conflict(
                                    f"model {name!r} exists with a different configuration",
                                    [q_field for q_field in _config_diff(existing, config)],
                                )
                            return self._describe(row, existing), False
                        now = self.clock()
                        cp = CheckpointRow(1, 0, State(spec).to_bytes(), ResidualMonitor.for_model(config, at=now).to_bytes())
                        row = q.insert_model(conn, name, config.to_json(), now, cp)
                        drift_store.set_reference(conn, row.id, "start", None, 0, row.version, now)
                    note_versions(None, row.version, action="create")
                    entry.live = None
                    log.info("model created", extra={"model": name})
                    return self._describe(row, config), True
                except IntegrityError:
                    continue  # created concurrently by another process: compare again
            raise Busy(f"model {name!r} is being created concurrently; retry")

    @staticmethod
    def _describe(row: q.ModelRow, config: ModelConfig) -> dict[str, Any]:
        return {"name": row.name, "config": config.to_dict(), "version": row.version, "created": rfc3339(row.created)}

    def list(self) -> list[dict[str, Any]]:
        with self.store.read() as conn:
            rows = q.list_models(conn)
        return [self._describe(r, ModelConfig.from_json(r.config)) for r in rows]

    def delete(self, name: str) -> None:
        entry = self._entry(name)
        with entry.lock:
            with self.store.write() as conn:
                row = q.model_by_name(conn, name)
                if row is None:
                    raise NotFound(f"no model named {name!r}")
                q.lock_model(conn, row.id)
                q.delete_model(conn, row.id)
            note_versions(row.version, None)
            entry.live = None
        log.info("model deleted", extra={"model": name})

    def etag(self, name: str) -> str:
        entry = self._entry(name)
        with entry.lock:
            return self._current(entry, name).etag()

    def get_if_fresh(self, name: str) -> tuple[dict[str, Any], str] | None:
        """The GET body and ETag when they can be answered at once, else ``None``.

        Only from an already built body, only if the model's lock is free (never
        waits), and only after the quick version check confirms the live model.
        Cheap enough for the event loop on the embedded database, where it saves
        the hop to a worker thread; every other case goes through :meth:`get`.
        """
        entry = self._entries.get(name)
        if entry is None or entry.live is None or entry.live.body is None:
            return None
        if not entry.lock.acquire(blocking=False):
            return None
        try:
            live = entry.live
            if live is None or live.body is None:
                return None
            seen = self.store.model_version(name)
            if (seen is None or seen[0] != live.id or seen[1] != live.version or seen[2] != live.epoch
                    or seen[3] != live.created):
                return None
            return live.get_body()
        finally:
            entry.lock.release()

    def get(self, name: str) -> tuple[dict[str, Any], str]:
        """State description and its ETag (the description is shared, built once per version: do not mutate it)."""
        entry = self._entry(name)
        with entry.lock:
            return self._current(entry, name).get_body()

    # ------------------------------------------------------------ observations
    def observe(self, name: str, body: Any) -> dict[str, Any]:
        """Apply one observation or a batch (see module docstring); duplicates by key are not applied.

        First try: optimistic, from the in-memory state (no state read from the
        database). If another process wrote meanwhile, the retry locks the model
        row first, catches up inside that transaction and cannot be overtaken.
        """
        entry = self._entry(name)
        if self.group_commit:
            with entry.lock:
                live = self._cached(entry, name)
                config, model_id = live.config, live.id
            observations, _batch = parse_observations(body, config, self.max_batch)
            job = _Job(entry, model_id, config, observations)
            try:
                self._group_writer().submit(job).wait()
                return self._answer(job.results, job.applied, self._committed(config, job.state, job.version))
            except _Stale:
                pass
        return self._observe_retry(entry, name, body)

    def _observe_retry(self, entry: _Entry, name: str, body: Any) -> dict[str, Any]:
        """Without grouping, or after a stale group write: under the model's lock, catching up as needed."""
        with entry.lock:
            live = self._cached(entry, name)
            config = live.config
            observations, _batch = parse_observations(body, config, self.max_batch)
            if not self.group_commit:
                try:
                    return self._observe_optimistic(live, observations)
                except _Stale:
                    pass
            for _attempt in range(_RETRIES):
                live = self._current(entry, name)
                if live.config != config:  # pragma: no cover - deleted and re-created meanwhile
                    config = live.config
                    observations, _batch = parse_observations(body, config, self.max_batch)
                try:
                    return self._observe_locked(entry, live, observations)
                except _Stale:
                    continue
            raise Busy(f"model {name!r} kept changing while the observations were applied; retry")

    #: Bodies with more observations than this are parsed in a worker thread, not on the event loop.
    INLINE_PARSE_LIMIT = 256

    async def observe_async(self, name: str, body: Any, *, minimal: bool = False) -> dict[str, Any]:
        """:meth:`observe` for a coroutine: the request joins the next group commit without a worker thread.

        Validation runs on the event loop (microseconds); the request then
        awaits its group's commit. A model not yet in memory, a large batch,
        ungrouped commits and the retry after another process wrote take
        :meth:`observe` in a worker thread. ``minimal``: on the grouped path the
        answer carries ``version`` and ``n`` but not the coefficients, so no
        solution is computed for it (the other paths answer in full).
        """
        entry = self._entry(name)
        live = entry.live  # read without the lock: the writer re-checks id and config under it
        many = body.get("observations") if isinstance(body, dict) else None
        if (live is None or not self.group_commit
                or (isinstance(many, list) and len(many) > self.INLINE_PARSE_LIMIT)):
            return await anyio.to_thread.run_sync(self.observe, name, body)
        config = live.config
        observations, _batch = parse_observations(body, config, self.max_batch)
        job = _Job(entry, live.id, config, observations, minimal=minimal)
        try:
            await self._group_writer().submit_async(job)
        except _Stale:
            return await anyio.to_thread.run_sync(self._observe_retry, entry, name, body)
        if job.answer is not None:
            return job.answer
        return self._answer(job.results, job.applied, self._committed_for(job))

    def _observe_optimistic(self, live: LiveModel, observations: list[Observation]) -> dict[str, Any]:
        now = self.clock()
        keys = [o.key for o in observations if o.key is not None]
        known: dict[str, int] = {}
        if keys:
            with self.store.read() as conn:
                known = q.find_keys(conn, live.id, keys)
        prepared = self._prepare(live, observations, known, now)
        if prepared.pending is not None:
            self._commit([prepared.pending], now)
        return self._apply(live, prepared)

    def _observe_locked(self, entry: _Entry, live: LiveModel, observations: list[Observation]) -> dict[str, Any]:
        now = self.clock()
        try:
            with self.store.write() as conn:
                row = q.lock_model(conn, live.id)
                if row is None:
                    raise _Stale()
                if row.version != live.version:
                    live = entry.live = self._catch_up(live, row, conn)
                keys = [o.key for o in observations if o.key is not None]
                known = q.find_keys(conn, live.id, keys) if keys else {}
                prepared = self._prepare(live, observations, known, now)
                if prepared.pending is not None:
                    q.write_pending(conn, [prepared.pending], now)
                    if not prepared.pending.accepted:  # pragma: no cover - the row is locked
                        raise _Stale()
        except IntegrityError as exc:
            raise _Stale() from exc
        return self._apply(live, prepared)

    def _prepare(self, live: LiveModel, observations: list[Observation], known: dict[str, int], now: float) -> "_Prepared":
        """Engine updates on copies of the live state, and the rows to write; memory is not touched."""
        state = live.state.copy()
        monitor = live.monitor.copy()
        results, rows, seq, _keys = self._steps(live.config, state, monitor, observations, known, live.seq, now)
        pending = None
        checkpoint = None
        if rows:
            version = live.version + 1
            if seq - live.checkpoint_seq >= self.checkpoint_every:
                checkpoint = CheckpointRow(version, seq, state.to_bytes(), monitor.to_bytes())
            pending = PendingWrite(live.id, live.version, version, seq, rows, checkpoint, compact=self.compact_log,
                                   drift_events=monitor.take_events())
        return _Prepared(state, monitor, results, pending)

    def _steps(self, config: ModelConfig, state: State, monitor: ResidualMonitor, observations: list[Observation],
               known: dict[str, int], seq: int, now: float
               ) -> tuple[list[dict[str, Any]], list[LogRow], int, dict[str, int]]:
        """Apply ``observations`` to ``state``/``monitor`` (copies the caller owns); keys in ``known`` are duplicates.

        Returns the per-observation results, the log rows, the new seq and the keys applied here.
        """
        admitted: list[_Admitted] = []
        results, seq, keys, _last = self._admit(config, state.last_time, observations, known, seq, now, admitted)
        rows = self._absorb(state, monitor, admitted, now)
        return results, rows, seq, keys

    @staticmethod
    def _admit(config: ModelConfig, last_t: float | None, observations: list[Observation], known: dict[str, int],
               seq: int, now: float, admitted: list["_Admitted"]
               ) -> tuple[list[dict[str, Any]], int, dict[str, int], float | None]:
        """Sort one request's observations into duplicates and ones to apply; nothing is applied yet.

        ``last_t`` is the time of the last observation before this request, ``known`` the keys
        seen before it, ``seq`` the last seq. Appends ``(results, index, observation, t, seq)``
        to ``admitted`` for each observation to apply (its result, at ``results[index]``, is
        filled in by :meth:`_absorb`). Returns the results (duplicates answered), the seq, the
        keys applied here and the last time after the request. Raises :class:`InvalidInput`
        for a time going backwards, before anything is appended.
        """
        half_life = config.half_life is not None
        results: list[dict[str, Any]] = []
        mine: list[_Admitted] = []
        batch_keys: dict[str, int] = {}
        many = len(observations) > 1
        for i, o in enumerate(observations):
            key = o.key
            if key is not None and (key in known or key in batch_keys):
                results.append({"status": "duplicate", "key": key, "seq": known.get(key, batch_keys.get(key))})
                continue
            t = o.t
            if t is None and half_life:
                t = now if last_t is None else max(now, last_t)  # stamped at receipt (logged: replay is identical)
            if t is not None and last_t is not None and t < last_t:
                where = f"/observations/{i}" if many else ""
                raise InvalidInput.at(f"{where}/time", f"earlier than the model's last observation time {rfc3339(last_t)}")
            if t is not None:
                last_t = t
            # A gap of over ~1074 half-lives decays the past to weight 0: the engine then starts afresh.
            seq += 1
            if key is not None:
                batch_keys[key] = seq
            mine.append((results, len(results), o, t, seq))
            results.append(_PLACEHOLDER)
        admitted.extend(mine)
        return results, seq, batch_keys, last_t

    @staticmethod
    def _absorb(state: State, monitor: ResidualMonitor, admitted: list["_Admitted"], now: float) -> list[LogRow]:
        """Apply admitted observations (of one model, in seq order) and fill in their results; the log rows.

        Without a drift gate they go through the engine's blocked update
        (:meth:`ResidualMonitor.advance_block`), whose blocks the log records so
        replay repeats them; with one, observation by observation, since each
        gate decision depends on the state the previous one left.
        """
        rows: list[LogRow] = []
        timed = sum(1 for a in admitted if a[3] is not None)
        outcomes: Iterable[tuple[Step, str, dict[str, Any] | None, int | None]]
        if len(admitted) > 1 and monitor.settings.get("gate") is None and timed in (0, len(admitted)):
            outcomes = monitor.advance_block(
                state, np.array([a[2].x for a in admitted]), [a[2].y for a in admitted],
                [a[3] for a in admitted] if timed else None, [a[4] for a in admitted])
        else:
            # drift hook per observation: gate, update, detectors
            outcomes = (monitor.advance(state, o.x, o.y, t, seq) + (None,) for _, _, o, t, seq in admitted)
        for (results, index, o, t, seq), (step, status, change, block) in zip(admitted, outcomes):
            key = o.key
            rows.append(LogRow(seq, _x_bytes(o.x), o.y, t, key, status, now, block))
            result = step_view(step, seq, t)
            if status != "applied":
                result["status"] = status
            if change is not None:
                result["drift"] = change
            if key is not None:
                result["key"] = key
            results[index] = result
        return rows

    # ------------------------------------------------------------ group commit (writer thread)
    def _run_group(self, tickets: list[Ticket]) -> None:
        """Prepare every queued request on copies, commit them in one transaction, then swap the copies in.

        Requests for one model are admitted in order (keys, times), then
        their observations are applied together on one copy (engine blocks
        across requests, see :meth:`_absorb`) and become one write that
        advances the version once per request. Each answer carries its own observations'
        results and the model as committed by the group (version, n,
        coefficients after the group's last request for that model). Nothing
        in memory changes before the commit; a model whose write was rejected
        (another process wrote, or it was reset or deleted meanwhile) answers
        its requests with ``_Stale`` and they take the locked path.
        """
        now = self.clock()
        tips: dict[int, _Tip] = {}

        def prepare(conn: Any) -> list[PendingWrite]:
            """Inside the write transaction: look up the keys, prepare every request, return the writes."""
            pairs = [(t.job.model_id, o.key) for t in tickets for o in t.job.observations if o.key is not None]
            found = q.find_keys_many(conn, pairs) if pairs else {}
            return self._prepare_group(tickets, tips, found, now)

        commit_group(self.store, prepare, now, self._commit_delay,  # raises: every ticket fails, memory untouched
                     before_commit=lambda: self._answer_early(tickets))
        committed: list[list[dict[str, Any]]] = []  # the results of the requests this group committed
        for tip in tips.values():
            w = tip.write
            if w is not None and not w.accepted:
                for ticket in tip.jobs:
                    ticket.fail(_Stale())
                continue
            if w is not None:
                entry = tip.jobs[0].job.entry
                with entry.lock:
                    live = tip.live
                    # swap only what is still the base of this write (a read may have caught up meanwhile)
                    if entry.live is live and live.version == w.expected_version:
                        live.state, live.monitor, live.view = tip.state, tip.monitor, tip.state
                        live.version, live.seq = w.new_version, w.new_seq
                        if w.checkpoint is not None:
                            live.checkpoint_seq, live.checkpoint_version = w.new_seq, w.new_version
            for ticket in tip.jobs:
                ticket.resolve(None)
            committed.extend(ticket.job.results for ticket in tip.jobs if ticket.job.results is not None)
        if committed:  # one count (one lock) per group, not per request
            self.observations.add(r for results in committed for r in results)

    def _answer_early(self, tickets: list[Ticket]) -> None:
        """Solve each model of the group here, then hand the requests to their event loops for the answers.

        Runs in the writer thread just before the commit. The solutions (the
        coefficients, the costly part of a full answer: ~170 us a model at
        d = 8) are computed here, where the states were just made, and the event
        loop only assembles the answers while the commit waits for the disk.
        Leaving the solutions to the loop as well cost more with many models a
        group: in five alternating pairs of runs at 10,000 models (16 connections)
        the CPU a request was 2.0-2.6 times that of one model that way against
        1.8-2.2 times this way (README, Performance). An answer is sent only once
        its ticket is released after the commit; if the commit fails it is dropped.
        """
        by_loop: dict[Any, list[_Job]] = {}
        for t in tickets:
            job: _Job = t.job
            if t.future is not None and not t.resolved and job.state is not None:
                if not job.minimal:
                    try:
                        job.state.solution()  # cached on the state; the loop's answer reads it
                    except Exception:  # noqa: BLE001 - left to the answer, which reports it as before
                        pass
                by_loop.setdefault(t.future.get_loop(), []).append(job)
        for loop, jobs in by_loop.items():
            try:
                loop.call_soon_threadsafe(self._build_answers, jobs)
            except RuntimeError:  # the loop has closed: nobody is waiting
                pass

    def _build_answers(self, jobs: list[_Job]) -> None:
        shared: dict[tuple[int, bool], dict[str, Any]] = {}  # the committed model's part, once per model of the group
        for job in jobs:  # prepared jobs only (see _answer_early)
            committed = shared.get((id(job.state), job.minimal))
            if committed is None:
                committed = shared[(id(job.state), job.minimal)] = self._committed_for(job)
            job.answer = self._answer(job.results, job.applied, committed)

    def _committed_for(self, job: _Job) -> dict[str, Any]:
        """:meth:`_committed`, or for a minimal answer only the version and count (no solution needed)."""
        assert job.state is not None
        if job.minimal:
            return {"version": job.version, "n": job.state.n}
        return self._committed(job.config, job.state, job.version)

    def _prepare_group(self, tickets: list[Ticket], tips: dict[int, "_Tip"], found: dict[tuple[int, str], int],
                       now: float) -> list[PendingWrite]:
        """Chain every request on copies of its model's state (one tip per model); the writes to commit."""
        known: dict[int, dict[str, int]] = {}
        for (mid, key), seq in found.items():
            known.setdefault(mid, {})[key] = seq
        for ticket in tickets:
            job: _Job = ticket.job
            tip = tips.get(job.model_id)
            if tip is None:
                with job.entry.lock:
                    live = job.entry.live
                    if live is None or live.id != job.model_id or live.config != job.config:
                        ticket.fail(_Stale())
                        continue
                    tip = _Tip(live, live.state, live.monitor, live.version, live.version, live.seq, live.checkpoint_seq,
                               live.state.last_time)
                tips[job.model_id] = tip
            model_known = known.setdefault(job.model_id, {})
            # Each request is admitted against the ones before it in the group (keys, times);
            # its observations are applied below, with the rest of its model's.
            try:
                results, seq, keys, last_t = self._admit(job.config, tip.last_time, job.observations, model_known,
                                                         tip.seq, now, tip.admitted)
            except Exception as exc:  # noqa: BLE001 - this request's error (a time going backwards); nothing admitted
                ticket.fail(exc)
                continue
            model_known.update(keys)
            applied = seq - tip.seq
            job.results, job.applied = results, applied
            if applied:
                tip.seq, tip.last_time = seq, last_t
                tip.version += 1
            tip.jobs.append(ticket)
        for mid, tip in list(tips.items()):
            if not tip.admitted:
                continue
            # One working copy per model and group; all its requests' observations in one go
            # (engine blocks across requests: the log records them, replay repeats them).
            state, monitor = tip.state.copy(), tip.monitor.copy()
            try:
                tip.rows = self._absorb(state, monitor, tip.admitted, now)
            except Exception:  # noqa: BLE001 - unexpected (inputs are checked): each request retries alone
                log.warning("model %s: a group's update failed; its requests retry one by one", mid, exc_info=True)
                for other in tip.jobs:
                    other.fail(_Stale())
                del tips[mid]
                continue
            tip.state, tip.monitor = state, monitor
        writes: list[PendingWrite] = []
        for mid, tip in tips.items():
            # Every answer describes the model as this transaction commits it: the
            # versions in between are never visible to anyone, and one solution per
            # model and group serves all its answers.
            for ticket in tip.jobs:
                ticket.job.state, ticket.job.version = tip.state, tip.version
            if not tip.rows:
                continue
            checkpoint = None
            if tip.seq - tip.checkpoint_seq >= self.checkpoint_every:
                checkpoint = CheckpointRow(tip.version, tip.seq, tip.state.to_bytes(), tip.monitor.to_bytes())
            tip.write = PendingWrite(mid, tip.base_version, tip.version, tip.seq, tip.rows, checkpoint,
                                     compact=self.compact_log, drift_events=tip.monitor.take_events())
            writes.append(tip.write)
        return writes

    @staticmethod
    def _committed(config: ModelConfig, state: State, version: int) -> dict[str, Any]:
        """The answer's description of the committed model (never mutated: answers of one group share it)."""
        sol = state.solution()  # cached on the state, which becomes the live one
        return {
            "version": version,
            "n": state.n,
            "identifiable": bool(sol.identifiable),
            "coefficients": by_name(config, sol.coefficients),
            "sigma": sol.sigma if sol.sigma is None or math.isfinite(sol.sigma) else None,
        }

    @staticmethod
    def _answer(results: list[dict[str, Any]], applied: int, committed: dict[str, Any]) -> dict[str, Any]:
        """The observation answer: this request's results and the committed model (:meth:`_committed`)."""
        gated = sum(1 for r in results if r.get("status") == "gated")  # logged, not applied (drift gate)
        out = {
            "results": results,
            "applied": applied - gated,
            "duplicates": len(results) - applied,
            **committed,
        }
        if gated:
            out["gated"] = gated
        drift_changes = [r["drift"] for r in results if "drift" in r]
        if drift_changes:  # the drift status changed during this request: the status after it
            out["drift"] = drift_changes[-1]
        return out

    def _apply(self, live: LiveModel, prepared: "_Prepared") -> dict[str, Any]:
        """After the commit: the copies become the live state; build the answer."""
        pending = prepared.pending
        if pending is not None:
            # the live state is never updated in place (writes work on copies): it doubles as the read view
            live.state, live.monitor, live.view = prepared.state, prepared.monitor, prepared.state
            live.version, live.seq = pending.new_version, pending.new_seq
            if pending.checkpoint is not None:
                live.checkpoint_seq, live.checkpoint_version = pending.new_seq, pending.new_version
        applied = len(pending.rows) if pending is not None else 0
        self.observations.add(prepared.results)
        return self._answer(prepared.results, applied, self._committed(live.config, live.read_view(), live.version))

    def _commit(self, writes: list[PendingWrite], now: float) -> None:
        """Commit prepared writes in one transaction; raise :class:`_Stale` if any was rejected."""
        try:
            with self.store.write() as conn:
                q.write_pending(conn, writes, now)
                if not all(w.accepted for w in writes):
                    raise _Stale()
        except IntegrityError as exc:  # a key or seq written concurrently by another process
            raise _Stale() from exc

    # ------------------------------------------------------------ reads
    def predict(self, name: str, body: Any) -> dict[str, Any]:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            rows, many, level = parse_predict(body, live.config, self.max_batch)
            view = live.read_view()
            pred = view.predict(np.asarray(rows, dtype=np.float64), level)
            common = {"level": pred.level, "dof": pred.dof if math.isfinite(pred.dof) else None,
                      "approximate": bool(pred.approximate), "version": live.version}
            if many:
                return {"predictions": [prediction_view(pred, i) for i in range(len(rows))], **common}
            return {**prediction_view(pred, 0), **common}

    def covariance(self, name: str) -> dict[str, Any]:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            return {"version": live.version, **covariance_view(live.config, live.read_view())}

    def drift(self, name: str, history: bool = False) -> dict[str, Any]:
        """Every drift statistic (models/drift.py); ``history`` adds the batch CUSUM paths since the reference."""
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            hist = None
            if history:
                with self.store.read() as conn:
                    hist = drift_hooks.history(conn, live)
            return {"version": live.version, **live.monitor.report(live.config, live.read_view(), hist)}

    def drift_events(self, name: str, after: int = 0, limit: int = 100, status: str | None = None) -> dict[str, Any]:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            with self.store.read() as conn:
                events = drift_store.list_events(conn, live.id, after=after, limit=limit, status=status)
        return {"events": events, "next_after": events[-1]["id"] if len(events) == limit else None}

    def move_reference(self, name: str, body: Any) -> dict[str, Any]:
        """Move the drift reference point to a snapshot or to now; clears every alarm (an operator action)."""
        snapshot_id = drift_hooks.parse_reference_body(body)
        entry = self._entry(name)
        make, hook = drift_hooks.move_reference(snapshot_id, name)
        with entry.lock:
            live = self._replace_state(entry, name, make, hook)
            log.info("drift reference moved", extra={"model": name, "snapshot": snapshot_id, "version": live.version})
            return {"name": name, "version": live.version, **live.monitor.status()}

    # ------------------------------------------------------------ whole-state changes
    def _replace_state(self, entry: _Entry, name: str, make: Callable[[Any, LiveModel], tuple[bytes, bytes]],
                       drift: Callable[..., bytes] | None = None) -> LiveModel:
        """Replace the state wholesale (reset, restore): new epoch, checkpoint at the current log position.

        ``drift(conn, live, drift_bytes, version, seq, at)`` (models/drift.py) adjusts the monitor bytes
        and records the reference point and event in the same transaction.
        """
        live = self._current(entry, name)
        with self.store.write() as conn:
            row = q.lock_model(conn, live.id)
            if row is None:
                entry.live = None
                raise NotFound(f"no model named {name!r}")
            note_versions(row.version, row.version)  # until it succeeds
            state_bytes, drift_bytes = make(conn, live)
            version, epoch = row.version + 1, row.epoch + 1
            if drift is not None:
                drift_bytes = drift(conn, live, drift_bytes, version, row.seq, self.clock())
            q.insert_checkpoint(conn, live.id, CheckpointRow(version, row.seq, state_bytes, drift_bytes), self.clock())
            if self.compact_log:
                q.compact(conn, live.id)
            q.bump_model(conn, live.id, version, row.seq, epoch)
        note_versions(row.version, version)
        live.state = State.from_bytes(state_bytes)
        live.monitor = ResidualMonitor.from_bytes(drift_bytes, live.config.forgetting)
        live.view = None
        live.version, live.seq, live.epoch = version, row.seq, epoch
        live.checkpoint_seq, live.checkpoint_version = row.seq, version
        return live

    def reset(self, name: str) -> dict[str, Any]:
        entry = self._entry(name)
        with entry.lock:
            live = self._replace_state(
                entry, name,
                lambda _conn, lv: (State(lv.config.spec()).to_bytes(), b""),
                drift_hooks.after_reset,
            )
            log.info("model reset", extra={"model": name, "version": live.version})
            return {"name": name, "version": live.version, "n": live.state.n}

    def snapshot(self, name: str, body: Any) -> dict[str, Any]:
        label = None
        if body is not None:
            if not isinstance(body, dict) or any(k != "label" for k in body):
                raise InvalidInput.at("", 'the body must be {"label": "..."} (label optional)')
            label = body.get("label")
            if label is not None and not (isinstance(label, str) and len(label) <= 200):
                raise InvalidInput.at("/label", "must be a string of at most 200 characters")
        entry = self._entry(name)
        with entry.lock:
            for _ in range(_RETRIES):
                live = self._current(entry, name)
                now = self.clock()
                state_bytes, drift_bytes = live.state.to_bytes(), live.monitor.to_bytes()
                with self.store.write() as conn:
                    row = q.lock_model(conn, live.id)
                    if row is None or row.version != live.version:
                        continue
                    snap = q.insert_snapshot(conn, live.id, label, now, live.version, live.state.n, state_bytes, drift_bytes)
                    if live.checkpoint_version != live.version:
                        cp = q.latest_checkpoint(conn, live.id)
                        if cp is None or cp.version != live.version:
                            q.insert_checkpoint(conn, live.id, CheckpointRow(live.version, live.seq, state_bytes, drift_bytes), now)
                        live.checkpoint_seq, live.checkpoint_version = live.seq, live.version
                note_versions(live.version, live.version, detail=f"snapshot {snap.id}")
                return _snapshot_view(snap)
            raise Busy(f"model {name!r} kept changing; retry")

    def snapshots(self, name: str) -> list[dict[str, Any]]:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            with self.store.read() as conn:
                return [_snapshot_view(s) for s in q.list_snapshots(conn, live.id)]

    def restore(self, name: str, snapshot_id: int) -> dict[str, Any]:
        entry = self._entry(name)

        def make(conn: Any, lv: LiveModel) -> tuple[bytes, bytes]:
            snap = q.get_snapshot(conn, lv.id, snapshot_id)
            if snap is None:
                raise NotFound(f"model {name!r} has no snapshot {snapshot_id}")
            return snap.state or b"", snap.drift or b""

        note_detail(f"snapshot {snapshot_id}")
        with entry.lock:
            live = self._replace_state(entry, name, make, drift_hooks.after_restore(snapshot_id))
            log.info("snapshot restored", extra={"model": name, "snapshot": snapshot_id, "version": live.version})
            return {"name": name, "snapshot": snapshot_id, "version": live.version, "n": live.state.n}

    def delete_snapshot(self, name: str, snapshot_id: int) -> None:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            note_versions(live.version, live.version, detail=f"snapshot {snapshot_id}")
            with self.store.write() as conn:
                if not q.delete_snapshot(conn, live.id, snapshot_id):
                    raise NotFound(f"model {name!r} has no snapshot {snapshot_id}")

    # ------------------------------------------------------------ maintenance
    def compact(self) -> int:
        """Delete log rows below each model's newest checkpoint; returns how many."""
        with self.store.write() as conn:
            return q.compact(conn)

    def live_state(self, name: str) -> State:
        """A copy of the live engine state (for tests and tools)."""
        entry = self._entry(name)
        with entry.lock:
            return self._current(entry, name).state.copy()


def _snapshot_view(s: q.SnapshotRow) -> dict[str, Any]:
    return {"id": s.id, "label": s.label, "created": rfc3339(s.created), "version": s.version, "n": s.n}


def _config_diff(a: ModelConfig, b: ModelConfig) -> Iterable[Any]:
    from .errors import FieldError

    old_d, new_d = a.to_dict(), b.to_dict()
    for key in dict.fromkeys([*old_d, *new_d]):
        old, new = old_d.get(key), new_d.get(key)
        if old != new:
            yield FieldError(f"/{key}", f"differs from the existing model's {old!r}")
