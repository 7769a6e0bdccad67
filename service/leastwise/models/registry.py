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
SELECT) and catch up the same way, so several processes sharing one
PostgreSQL database see each other's changes.

Replays are bit-exact: the live path and replay apply the same rows with the
same ``State.update`` calls to states that never had their solution cached
(reads work on a separate copy).
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sqlalchemy.exc import IntegrityError

from leastwise.engine import State
from leastwise.store import CheckpointRow, LogRow, PendingWrite, Store
from leastwise.store import queries as q

from .config import ModelConfig, check_model_name
from .drift import ResidualMonitor
from .errors import Busy, Conflict, InvalidInput, NotFound
from .inputs import Observation, parse_observations, parse_predict
from .views import covariance_view, prediction_view, rfc3339, state_view, step_view

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

    def read_view(self) -> State:
        if self.view is None:
            self.view = self.state.copy()
        return self.view

    def etag(self) -> str:
        return f'"{self.id}.{self.version}"'


@dataclass(slots=True)
class _Entry:
    lock: threading.Lock = field(default_factory=threading.Lock)
    live: LiveModel | None = None


def _x_bytes(row: list[float]) -> bytes:
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
    ) -> None:
        self.store = store
        self.checkpoint_every = checkpoint_every
        self.compact_log = compact_log
        self.max_batch = max_batch
        self.clock = clock
        self._entries: dict[str, _Entry] = {}
        self._guard = threading.Lock()

    # ------------------------------------------------------------ plumbing
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
        last = cp.seq
        for r in q.log_after(conn, row.id, cp.seq, upto=row.seq):
            monitor.observe(state.update(_x_row(r.x), r.y, r.t))
            last = r.seq
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
        for r in q.log_after(conn, row.id, live.seq, upto=row.seq):
            monitor.observe(state.update(_x_row(r.x), r.y, r.t))
        live.state, live.monitor, live.view = state, monitor, None
        live.version, live.seq = row.version, row.seq
        return live

    def _current(self, entry: _Entry, name: str) -> LiveModel:
        """The live model, validated against the stored version (caller holds ``entry.lock``)."""
        with self.store.read() as conn:
            row = q.model_by_name(conn, name)
            if row is None:
                entry.live = None
                raise NotFound(f"no model named {name!r}")
            live = entry.live
            if live is None:
                live = self._load(row, conn)
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
                            if existing != config:
                                raise Conflict(
                                    f"model {name!r} exists with a different configuration",
                                    [q_field for q_field in _config_diff(existing, config)],
                                )
                            return self._describe(row, existing), False
                        now = self.clock()
                        cp = CheckpointRow(1, 0, State(spec).to_bytes(), ResidualMonitor(config.forgetting).to_bytes())
                        row = q.insert_model(conn, name, config.to_json(), now, cp)
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
            entry.live = None
        log.info("model deleted", extra={"model": name})

    def etag(self, name: str) -> str:
        entry = self._entry(name)
        with entry.lock:
            return self._current(entry, name).etag()

    def get(self, name: str) -> tuple[dict[str, Any], str]:
        """State description and its ETag."""
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            out = {
                "name": live.name,
                "config": live.config.to_dict(),
                "version": live.version,
                "created": rfc3339(live.created),
                **state_view(live.config, live.read_view()),
                "drift": live.monitor.status(),
            }
            return out, live.etag()

    # ------------------------------------------------------------ observations
    def observe(self, name: str, body: Any) -> dict[str, Any]:
        """Apply one observation or a batch (see module docstring); duplicates by key are not applied.

        First try: optimistic, from the in-memory state (no state read from the
        database). If another process wrote meanwhile, the retry locks the model
        row first, catches up inside that transaction and cannot be overtaken.
        """
        entry = self._entry(name)
        with entry.lock:
            live = self._cached(entry, name)
            config = live.config
            observations, _batch = parse_observations(body, config, self.max_batch)
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
        half_life = live.config.half_life is not None
        last_t = state.last_time
        results: list[dict[str, Any]] = []
        rows: list[LogRow] = []
        seq = live.seq
        batch_keys: dict[str, int] = {}
        for i, o in enumerate(observations):
            where = f"/observations/{i}" if len(observations) > 1 else ""
            if o.key is not None and (o.key in known or o.key in batch_keys):
                results.append({"status": "duplicate", "key": o.key, "seq": known.get(o.key, batch_keys.get(o.key))})
                continue
            t = o.t
            if t is None and half_life:
                t = now if last_t is None else max(now, last_t)  # stamped at receipt (logged: replay is identical)
            if t is not None and last_t is not None and t < last_t:
                raise InvalidInput.at(f"{where}/time", f"earlier than the model's last observation time {rfc3339(last_t)}")
            if t is not None:
                last_t = t
            # A gap of over ~1074 half-lives decays the past to weight 0: the engine then starts afresh.
            step = state.update(o.x, o.y, t)
            monitor.observe(step)
            seq += 1
            if o.key is not None:
                batch_keys[o.key] = seq
            rows.append(LogRow(seq, _x_bytes(o.x), o.y, t, o.key, "applied", now))
            result = step_view(step, seq, t)
            if o.key is not None:
                result["key"] = o.key
            results.append(result)
        pending = None
        checkpoint = None
        if rows:
            version = live.version + 1
            if seq - live.checkpoint_seq >= self.checkpoint_every:
                checkpoint = CheckpointRow(version, seq, state.to_bytes(), monitor.to_bytes())
            pending = PendingWrite(live.id, live.version, version, seq, rows, checkpoint, compact=self.compact_log)
        return _Prepared(state, monitor, results, pending)

    def _apply(self, live: LiveModel, prepared: "_Prepared") -> dict[str, Any]:
        """After the commit: the copies become the live state; build the answer."""
        pending = prepared.pending
        if pending is not None:
            live.state, live.monitor, live.view = prepared.state, prepared.monitor, None
            live.version, live.seq = pending.new_version, pending.new_seq
            if pending.checkpoint is not None:
                live.checkpoint_seq, live.checkpoint_version = pending.new_seq, pending.new_version
        view = live.read_view()
        sol = view.solution()
        applied = len(pending.rows) if pending is not None else 0
        return {
            "results": prepared.results,
            "applied": applied,
            "duplicates": len(prepared.results) - applied,
            "version": live.version,
            "n": view.n,
            "identifiable": bool(sol.identifiable),
            "coefficients": state_view(live.config, view)["coefficients"],
            "sigma": sol.sigma if sol.sigma is None or math.isfinite(sol.sigma) else None,
        }

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

    def drift(self, name: str) -> dict[str, Any]:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
            return {"version": live.version, **live.monitor.report()}

    # ------------------------------------------------------------ whole-state changes
    def _replace_state(self, entry: _Entry, name: str, make: Callable[[Any, LiveModel], tuple[bytes, bytes]]) -> LiveModel:
        """Replace the state wholesale (reset, restore): new epoch, checkpoint at the current log position."""
        live = self._current(entry, name)
        with self.store.write() as conn:
            row = q.lock_model(conn, live.id)
            if row is None:
                entry.live = None
                raise NotFound(f"no model named {name!r}")
            state_bytes, drift_bytes = make(conn, live)
            version, epoch = row.version + 1, row.epoch + 1
            q.insert_checkpoint(conn, live.id, CheckpointRow(version, row.seq, state_bytes, drift_bytes), self.clock())
            if self.compact_log:
                q.compact(conn, live.id)
            q.bump_model(conn, live.id, version, row.seq, epoch)
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
                lambda _conn, lv: (State(lv.config.spec()).to_bytes(), ResidualMonitor(lv.config.forgetting).to_bytes()),
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

        with entry.lock:
            live = self._replace_state(entry, name, make)
            log.info("snapshot restored", extra={"model": name, "snapshot": snapshot_id, "version": live.version})
            return {"name": name, "snapshot": snapshot_id, "version": live.version, "n": live.state.n}

    def delete_snapshot(self, name: str, snapshot_id: int) -> None:
        entry = self._entry(name)
        with entry.lock:
            live = self._current(entry, name)
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

    for key, old in a.to_dict().items():
        new = b.to_dict()[key]
        if old != new:
            yield FieldError(f"/{key}", f"differs from the existing model's {old!r}")
