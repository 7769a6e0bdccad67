"""Group commit: one writer thread per database shares one transaction among the requests that queue up.

A request hands a job to :meth:`GroupWriter.submit_async` and awaits the
returned future on the event loop (a thread may use :meth:`GroupWriter.submit`
and block on the :class:`Ticket`). The writer thread takes every job that queued up
while the previous transaction was committing (at most ``max_group``), hands
the list to the registry's group handler (which prepares the engine updates
on copies, writes them with :func:`commit_group` in *one* transaction and,
after the commit, swaps the copies in), and the handler resolves each ticket.
So each answer still waits for the commit of its own transaction, and the
cost of a commit (an fsync on SQLite, a round trip and WAL flush on
PostgreSQL) is shared by everyone who arrived while the previous one was in
flight. An idle writer commits a lone request at once: no added latency.

Gathering: before a transaction that would start with fewer than
``gather_below`` requests queued, the writer lets the event loop of the first
one finish what it already has in hand (a callback it schedules there and
waits for, at most ``gather_wait`` seconds). Requests whose bytes have
arrived are then parsed and queued and join this transaction instead of the
next one. Without it, at 16 connections a group held about 8 requests
because the writer started as soon as the first few were queued; with it,
about twice as many, and the per-group work (the transaction, the model's
solution for the answers) is shared by twice as many requests
(``tests/bench/service.py``). With many requests already queued it is
skipped: waiting then only adds latency.

``LEASTWISE_DEBUG_COMMIT_DELAY`` (seconds, tests only) sleeps inside the write
transaction, after the rows are written and before the commit, so a test can
kill the process while a group commit is in flight.
"""

from __future__ import annotations

import asyncio
import logging
import os
import queue
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

from sqlalchemy.exc import IntegrityError

from leastwise.store import PendingWrite, Store
from leastwise.store import queries as q

from .tally import Buckets, WriterStats

__all__ = ["Ticket", "GroupWriter", "commit_group", "debug_commit_delay"]

log = logging.getLogger("leastwise.models.writer")

_STOP = object()

#: Histogram bounds of the metrics: requests per group (up to ``max_group``, 256 by default) and
#: seconds per group (an SQLite fsync takes ~0.2 ms here, a congested disk tens of ms).
GROUP_SIZE_BOUNDS = (1, 2, 4, 8, 16, 32, 64, 128, 256)
GROUP_SECONDS_BOUNDS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 1.0)


def debug_commit_delay() -> float:
    raw = os.environ.get("LEASTWISE_DEBUG_COMMIT_DELAY", "")
    try:
        return max(0.0, float(raw)) if raw else 0.0
    except ValueError:
        return 0.0


class Ticket:
    """One queued job and, once the writer has answered its group, its outcome.

    A thread blocks in :meth:`wait`; a coroutine awaits :attr:`future` (see
    :meth:`GroupWriter.submit_async`), which the writer settles on the
    future's event loop with one wake-up per group, so an observation request
    needs no worker thread of its own.
    """

    __slots__ = ("job", "_done", "_value", "_error", "event", "future")

    def __init__(self, job: Any, future: "asyncio.Future[Any] | None" = None) -> None:
        self.job = job
        self._done = False
        self._value: Any = None
        self._error: BaseException | None = None
        self.future = future
        self.event = threading.Event() if future is None else None

    @property
    def resolved(self) -> bool:
        return self._done

    def resolve(self, value: Any) -> None:
        if not self._done:
            self._value = value
            self._done = True

    def fail(self, error: BaseException) -> None:
        if not self._done:
            self._error = error
            self._done = True

    def wait(self) -> Any:
        """The outcome, once the writer has released this ticket (threads only)."""
        assert self.event is not None, "an asynchronous ticket is awaited through its future"
        self.event.wait()
        if self._error is not None:
            raise self._error
        return self._value


def _settle(tickets: list[Ticket]) -> None:
    """On the event loop: hand each outcome to its future (a cancelled request's future is skipped)."""
    for t in tickets:
        fut = t.future
        if fut is None or fut.done():
            continue
        if t._error is not None:
            fut.set_exception(t._error)
        else:
            fut.set_result(t._value)


class GroupWriter:
    """The writer thread of one database. ``handler(tickets)`` must resolve every ticket it is given."""

    def __init__(self, handler: Callable[[list[Ticket]], None], *, max_group: int = 256,
                 name: str = "leastwise-writer", gather_below: int = 12, gather_wait: float = 0.0005,
                 after_group: Callable[[], None] | None = None) -> None:
        self.handler = handler
        self.after_group = after_group  # housekeeping once a group is answered (the store's between_writes)
        self.max_group = max(1, max_group)
        self.gather_below = gather_below
        self.gather_wait = gather_wait
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._closed = False
        self.groups = 0  # transactions run (for tests and metrics)
        self.jobs = 0
        self.failed_groups = 0  # groups whose handler raised: every request of it got the error
        # Written by the writer thread only (tally.py): requests per group, and each group's
        # time from taking its requests to having answered them (before their release).
        self.group_sizes = Buckets(GROUP_SIZE_BOUNDS)
        self.group_seconds = Buckets(GROUP_SECONDS_BOUNDS)
        # CPU time of this thread over the same spans (user and system, time.thread_time):
        # against the durations' sum it tells a writer busy computing from one waiting
        # (for the disk, or for the interpreter lock the event loop holds).
        self.cpu_seconds = 0.0
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def submit(self, job: Any) -> Ticket:
        """Queue ``job`` for a waiting thread: call ``.wait()`` on the ticket."""
        if self._closed:
            raise RuntimeError("the writer is closed")
        ticket = Ticket(job)
        self._queue.put(ticket)
        return ticket

    def submit_async(self, job: Any) -> "asyncio.Future[Any]":
        """Queue ``job`` from a coroutine on a running event loop; await the returned future."""
        if self._closed:
            raise RuntimeError("the writer is closed")
        future = asyncio.get_running_loop().create_future()
        self._queue.put(Ticket(job, future))
        return future

    def stats(self) -> WriterStats:
        """The counts so far (any thread may ask)."""
        return WriterStats(self.groups, self.jobs, self.failed_groups, self.group_sizes.cumulative(),
                           self.group_sizes.sum, self.group_seconds.cumulative(), self.group_seconds.sum,
                           self.cpu_seconds)

    def close(self, timeout: float = 10.0) -> None:
        if not self._closed:
            self._closed = True
            self._queue.put(_STOP)
            self._thread.join(timeout)

    def _run(self) -> None:
        stop = False
        while not stop:
            first = self._queue.get()
            if first is _STOP:
                return
            batch = [first]
            if first.future is not None and self.gather_wait > 0 and self._queue.qsize() + 1 < self.gather_below:
                self._gather(first.future.get_loop())
            while len(batch) < self.max_group:
                try:
                    item = self._queue.get_nowait()
                except queue.Empty:
                    break
                if item is _STOP:
                    stop = True
                    break
                batch.append(item)
            self.groups += 1
            self.jobs += len(batch)
            started = time.perf_counter()
            cpu_started = time.thread_time()
            try:
                self.handler(batch)
            except BaseException as exc:  # noqa: BLE001 - every waiting request gets the error
                self.failed_groups += 1
                if not isinstance(exc, Exception):
                    log.error("writer interrupted", exc_info=True)
                for ticket in batch:
                    ticket.fail(exc)
            # counted before the release, so whoever was answered sees its group in the stats
            self.group_sizes.observe(len(batch))
            self.group_seconds.observe(time.perf_counter() - started)
            self.cpu_seconds += time.thread_time() - cpu_started
            self._release(batch)
            if self.after_group is not None:
                try:
                    self.after_group()
                except Exception:  # noqa: BLE001 - housekeeping only; the next group goes on regardless
                    log.warning("housekeeping after a group failed", exc_info=True)

    def _gather(self, loop: asyncio.AbstractEventLoop) -> None:
        """Wait (at most ``gather_wait``) until ``loop`` has run the callbacks it already has (see the module docstring)."""
        reached = threading.Event()
        try:
            loop.call_soon_threadsafe(reached.set)
        except RuntimeError:  # the loop has closed
            return
        reached.wait(self.gather_wait)

    @staticmethod
    def _release(batch: list[Ticket]) -> None:
        by_loop: dict[Any, list[Ticket]] = {}
        for ticket in batch:
            if not ticket.resolved:  # a handler bug must never leave a request waiting forever
                ticket.fail(RuntimeError("the writer did not answer this request"))
            if ticket.event is not None:
                ticket.event.set()
            else:
                assert ticket.future is not None
                by_loop.setdefault(ticket.future.get_loop(), []).append(ticket)
        for loop, tickets in by_loop.items():
            try:
                loop.call_soon_threadsafe(_settle, tickets)
            except RuntimeError:  # the loop has closed (shutdown): nobody is waiting any more
                pass


def commit_group(store: Store, prepare: Callable[[Any], Sequence[PendingWrite]], now: float,
                 delay: float = 0.0, before_commit: Callable[[], None] | None = None) -> Sequence[PendingWrite]:
    """Open one write transaction, let ``prepare(conn)`` return the writes, write them and commit.

    ``prepare`` runs inside the transaction (the idempotency-key lookup and
    the engine updates of the whole group then cost one transaction, and on
    SQLite the write lock is already held). ``accepted`` on each write tells
    which were applied: a stale write (its model moved on) is skipped and the
    others commit. A constraint violation (a key or seq written meanwhile by
    another process) rolls back the group; each write is then retried in a
    transaction of its own, so one conflict only rejects its own write. Any
    other error (the database is unavailable) propagates with nothing committed.
    ``before_commit`` runs once the rows are written, just before the commit
    (the registry hands the prepared answers to the event loop there, so they
    are built while the commit waits for the disk).
    """
    writes: Sequence[PendingWrite] = ()
    try:
        with store.group_write() as conn:
            writes = prepare(conn)
            if writes:
                q.write_pending(conn, writes, now)
                if before_commit is not None:
                    before_commit()
                if delay:
                    time.sleep(delay)
        return writes
    except IntegrityError:
        if len(writes) <= 1:
            for w in writes:
                w.accepted = False
            return writes
    for w in writes:
        w.accepted = False
        try:
            with store.group_write() as conn:
                q.write_pending(conn, [w], now)
        except IntegrityError:
            w.accepted = False
    return writes
