"""Running counts for the service's metrics: plain integers, cheap enough for the hot path.

Nothing here knows an exposition format; ``api/metrics.py`` renders a
:class:`RegistryStats` snapshot as Prometheus text. A :class:`Buckets` is
written by one thread only (the writer thread, or the event loop) and may be
read from any: a reader sees every count as it was at some moment of the
update, which is all a scrape needs. :class:`ObservationTally` is written
from several threads and keeps a lock.
"""

from __future__ import annotations

import threading
from bisect import bisect_left
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["Buckets", "ObservationTally", "WriterStats", "RegistryStats"]


class Buckets:
    """Counts of observed values per upper bound (a cumulative histogram's ``le`` buckets, +Inf last).

    ``observe(v)`` adds one to the first bucket whose bound is ``>= v`` (a value
    equal to a bound counts in that bucket, as Prometheus' ``le`` says).
    """

    __slots__ = ("bounds", "counts", "sum")

    def __init__(self, bounds: Sequence[float]) -> None:
        self.bounds = tuple(sorted(float(b) for b in bounds))
        self.counts = [0] * (len(self.bounds) + 1)
        self.sum = 0.0

    def observe(self, value: float) -> None:
        self.counts[bisect_left(self.bounds, value)] += 1
        self.sum += value

    def cumulative(self) -> list[tuple[float, int]]:
        """``[(bound, observations <= bound), ..., (inf, all)]``."""
        out, running = [], 0
        for bound, n in zip((*self.bounds, float("inf")), list(self.counts)):
            running += n
            out.append((bound, running))
        return out

    @property
    def count(self) -> int:
        return sum(self.counts)


class ObservationTally:
    """Observations whose request committed, by result status (``applied``, ``duplicate``, ``gated``, ...)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._counts: dict[str, int] = {}

    def add(self, results: Iterable[dict[str, Any]]) -> None:
        """Count committed per-observation results (a missing status means ``applied``)."""
        with self._lock:
            counts = self._counts
            for r in results:
                status = r.get("status", "applied")
                counts[status] = counts.get(status, 0) + 1

    def snapshot(self) -> dict[str, int]:
        with self._lock:
            return dict(self._counts)


@dataclass(frozen=True, slots=True)
class WriterStats:
    """The group writer's counts since it started (see ``writer.py``)."""

    groups: int
    requests: int
    failed_groups: int
    group_sizes: list[tuple[float, int]]  # cumulative, as Buckets.cumulative
    group_sizes_sum: float
    group_seconds: list[tuple[float, int]]
    group_seconds_sum: float
    cpu_seconds: float = 0.0  # the writer thread's CPU time over the groups' durations


@dataclass(frozen=True, slots=True)
class RegistryStats:
    """What the registry can tell about itself without touching the database."""

    models_loaded: int
    drift_levels: dict[str, int]  # loaded models by drift status
    observations: dict[str, int]  # committed observations by result status
    writer: WriterStats | None = None  # None until the first grouped write
    backend: str = ""  # the database dialect: sqlite or postgresql
