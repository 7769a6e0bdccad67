"""``GET /v1/metrics``: the service's counts in the Prometheus text exposition format.

The counts are kept as plain integers where they happen (``models/tally.py``,
:class:`HttpTally` here, updated by :class:`.middleware.RequestLog`) and turned
into metric families only when scraped, by a custom collector of the
``prometheus_client`` library, which also writes the format and adds its
standard ``process_*`` metrics. Nothing is labelled by model: with thousands
of models the series would swamp a scraper; per-model figures are in
``GET /v1/models/{name}`` and its drift route.

Series (all cumulative since the process started, except the gauges):

- ``leastwise_http_responses_total{method, code}`` and
  ``leastwise_http_request_duration_seconds{route}`` (histogram; ``route`` is
  ``observations``, ``model`` or ``other``);
- ``leastwise_observations_total{status}``: observations in committed
  requests by result status (``applied``, ``duplicate``, ``gated``);
- ``leastwise_write_groups_total``, ``leastwise_write_group_failures_total``,
  ``leastwise_write_group_size`` and ``leastwise_write_group_duration_seconds``
  (histograms): the group commit (``models/writer.py``); size sum over count is
  the mean number of requests that shared one transaction;
  ``leastwise_write_cpu_seconds_total``: the writer thread's CPU time within
  those durations (well below the durations' sum: the writer mostly waits,
  for the disk or for the interpreter lock; close to it: its own work bounds
  the write rate);
- ``leastwise_models_loaded`` and ``leastwise_models_drift{status}``: models in
  memory, and those by drift status (``ok``, ``watch``, ``alarm``);
- ``leastwise_build_info{version, database}``: always 1.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, ProcessCollector, generate_latest
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    InfoMetricFamily,
    Metric,
)

from leastwise import __version__
from leastwise.models import Registry
from leastwise.models.tally import Buckets
from leastwise.models.writer import GROUP_SECONDS_BOUNDS, GROUP_SIZE_BOUNDS

__all__ = ["HttpTally", "Metrics", "CONTENT_TYPE_LATEST", "DURATION_BOUNDS"]

#: Request duration buckets (seconds): a fast-lane answer takes ~0.1 ms of work, a durable
#: write waits for its group's fsync (~0.2 ms to tens of ms), a large load can take seconds.
DURATION_BOUNDS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0)
_METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH", "OPTIONS"})
ROUTES = ("observations", "model", "other")


def route_of(method: str, path: str) -> str:
    """The ``route`` label: the two hot routes by name, everything else ``other`` (bounded cardinality)."""
    if path.startswith("/v1/models/"):
        rest = path[len("/v1/models/"):]
        if method == "POST" and rest.endswith("/observations") and rest.count("/") == 1:
            return "observations"
        if method == "GET" and rest and "/" not in rest:
            return "model"
    return "other"


class HttpTally:
    """Responses by method and status, durations by route. Updated on the event loop's thread only."""

    def __init__(self) -> None:
        self.responses: dict[tuple[str, int], int] = {}
        self.durations = {route: Buckets(DURATION_BOUNDS) for route in ROUTES}

    def count(self, method: str, path: str, status: int, seconds: float) -> None:
        key = (method if method in _METHODS else "other", status)
        self.responses[key] = self.responses.get(key, 0) + 1
        self.durations[route_of(method, path)].observe(seconds)


def _le(cumulative: list[tuple[float, int]]) -> list[tuple[str, int]]:
    """``Buckets.cumulative()`` with the bounds written as ``le`` label values."""
    return [("+Inf" if b == float("inf") else (str(int(b)) if b >= 1 and b == int(b) else repr(b)), n)
            for b, n in cumulative]


def _histogram(name: str, doc: str, cumulative: list[tuple[float, int]], total: float) -> HistogramMetricFamily:
    family = HistogramMetricFamily(name, doc)
    family.add_metric([], _le(cumulative), total)
    return family


class _Collector:
    """Builds the families from the registry's and the HTTP tally's counts at scrape time."""

    def __init__(self, registry: Registry, http: HttpTally) -> None:
        self.registry = registry
        self.http = http

    def collect(self) -> Iterator[Metric]:
        stats = self.registry.stats()
        yield InfoMetricFamily("leastwise_build", "The service's version and database backend.",
                               value={"version": __version__, "database": stats.backend})

        responses = CounterMetricFamily("leastwise_http_responses", "HTTP responses sent, by method and status code.",
                                        labels=["method", "code"])
        for (method, code), n in sorted(dict(self.http.responses).items()):
            responses.add_metric([method, str(code)], n)
        yield responses
        durations = HistogramMetricFamily("leastwise_http_request_duration_seconds",
                                          "Time from a request's arrival to its last response byte handed on.",
                                          labels=["route"])
        for route, buckets in self.http.durations.items():
            durations.add_metric([route], _le(buckets.cumulative()), buckets.sum)
        yield durations

        observations = CounterMetricFamily("leastwise_observations",
                                           "Observations in committed requests, by result status.", labels=["status"])
        for status, n in sorted(stats.observations.items()):
            observations.add_metric([status], n)
        yield observations

        w = stats.writer
        # completed groups (the +Inf bucket): WriterStats.groups also counts the one in progress
        yield CounterMetricFamily("leastwise_write_groups", "Group-commit transactions run to the end.",
                                  value=w.group_sizes[-1][1] if w else 0)
        yield CounterMetricFamily("leastwise_write_group_failures",
                                  "Groups whose transaction failed (every request in it got the error).",
                                  value=w.failed_groups if w else 0)
        # before the first grouped write: the same buckets, all zero (stable series for dashboards)
        yield _histogram("leastwise_write_group_size", "Requests that shared one group-commit transaction.",
                         w.group_sizes if w else Buckets(GROUP_SIZE_BOUNDS).cumulative(),
                         w.group_sizes_sum if w else 0.0)
        yield _histogram("leastwise_write_group_duration_seconds",
                         "Time per group: preparing the updates, the transaction and its commit, the answers.",
                         w.group_seconds if w else Buckets(GROUP_SECONDS_BOUNDS).cumulative(),
                         w.group_seconds_sum if w else 0.0)
        yield CounterMetricFamily("leastwise_write_cpu_seconds",
                                  "CPU time (user and system) of the writer thread within those group durations.",
                                  value=w.cpu_seconds if w else 0.0)

        yield GaugeMetricFamily("leastwise_models_loaded", "Models held in memory.", value=stats.models_loaded)
        drift = GaugeMetricFamily("leastwise_models_drift", "Models in memory by drift status.", labels=["status"])
        for status in ("ok", "watch", "alarm"):
            drift.add_metric([status], stats.drift_levels.get(status, 0))
        yield drift


class Metrics:
    """The exposition of one application: its collector and ``prometheus_client``'s process metrics."""

    def __init__(self, registry: Registry, http: HttpTally) -> None:
        self.collectors = CollectorRegistry(auto_describe=False)
        self.collectors.register(_Collector(registry, http))
        try:
            ProcessCollector(registry=self.collectors)  # CPU seconds, resident memory, open files (Linux)
        except Exception:  # noqa: BLE001 - not every platform has /proc; the service's own series remain
            pass

    def render(self) -> bytes:
        return generate_latest(self.collectors)


def attach(app: Any, registry: Registry) -> HttpTally:
    """Create the app's metrics (``app.state.metrics``) and return the tally the request log updates."""
    http = HttpTally()
    app.state.metrics = Metrics(registry, http)
    return http
