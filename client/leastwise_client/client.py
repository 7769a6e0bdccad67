"""The HTTP client for the leastwise REST contract v1.

Retries: a request that got no answer (connection refused or dropped, timeout)
or an answer that says nothing was applied (503, 429, 408, 409 ``busy``) is sent
again, up to ``retries`` more times with exponential back-off (or the
``Retry-After`` the service gave). Observations are safe to send again
because the client gives every observation without a key an idempotency key
(``lw-<random>:<index>``, made once per call, so each retry reuses it): the
service answers a repeated key as a duplicate and does not apply it twice.
Creating a snapshot is retried only when the request never reached the
service (it is the one call that is not idempotent).
"""

from __future__ import annotations

import json
import time as _time
import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from datetime import datetime, timezone
from typing import Any
from urllib.parse import quote

import httpx

from .errors import (
    Busy, NotFound, Problem, RequestTimeout, ServiceUnavailable, TooManyRequests, Unreachable, problem_from_response,
)
from .types import (
    Covariance, DriftReport, Inputs, ModelConfig, ModelInfo, ModelState, ObservationAnswer, Prediction, Reading,
    ReadingLike, Snapshot, StateChange, TimeLike,
)

__all__ = ["Client", "DEFAULT_URL", "USER_AGENT"]

DEFAULT_URL = "http://127.0.0.1:8622"
USER_AGENT = "leastwise-client/0.1"

# retry policies of one request
_SAFE = "safe"  # idempotent: retry after any transport failure
_SENT_ONLY = "connect"  # retry only when the request cannot have reached the service
_MINIMAL = {"Prefer": "return=minimal"}  # RFC 7240: the answer without the model

_CONNECT_FAILURES = (httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout)
_TRANSPORT_FAILURES = (httpx.TransportError,)


def _json_default(value: Any) -> Any:
    item = getattr(value, "item", None)  # numpy scalars
    if item is not None:
        return item()
    tolist = getattr(value, "tolist", None)  # numpy arrays
    if tolist is not None:
        return tolist()
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def _time_json(t: TimeLike) -> str | float | None:
    if t is None or isinstance(t, str):
        return t
    if isinstance(t, datetime):
        if t.tzinfo is None:  # a naive datetime is taken as UTC
            t = t.replace(tzinfo=timezone.utc)
        return t.isoformat()
    if isinstance(t, bool):
        raise TypeError("a time is an RFC 3339 string, epoch seconds or a datetime, not a bool")
    return float(t)


def _x_json(x: Inputs | float) -> Any:
    if isinstance(x, (int, float)) and not isinstance(x, bool):  # a one-feature model
        return [x]
    if isinstance(x, Mapping):
        return {str(k): v for k, v in x.items()}
    return list(x)


def _reading(item: ReadingLike) -> Reading:
    if isinstance(item, Reading):
        return item
    if isinstance(item, Mapping):
        return Reading(item["x"], item["y"], item.get("time"), item.get("key"))
    if isinstance(item, tuple) and 2 <= len(item) <= 4:
        return Reading(*item)
    raise TypeError("a reading is a Reading, a tuple (x, y[, time[, key]]) or a dict with x, y[, time, key]")


def _observation_json(r: Reading, key: str | None) -> dict[str, Any]:
    body: dict[str, Any] = {"x": _x_json(r.x), "y": r.y}
    if r.time is not None:
        body["time"] = _time_json(r.time)
    if key is not None:
        body["key"] = key
    return body


class Client:
    """A typed client for one leastwise service.

        with Client("http://127.0.0.1:8622", token=None) as lw:
            lw.create_model("ch-1", ["load_kw", "condenser_c"])
            lw.observe("ch-1", {"load_kw": 610.0, "condenser_c": 27.5}, 131.4)
            print(lw.model("ch-1").coefficients)

    ``timeout`` is seconds per request (or an ``httpx.Timeout``); ``retries``
    how many times a failed request is sent again; ``backoff`` the first wait
    (doubling, at most ``max_backoff``). ``auto_keys=False`` sends
    observations without keys (then they are retried only when the request
    cannot have arrived). ``transport`` is handed to httpx (tests, proxies).
    """

    def __init__(
        self,
        url: str = DEFAULT_URL,
        *,
        token: str | None = None,
        timeout: float | httpx.Timeout = 10.0,
        retries: int = 3,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        auto_keys: bool = True,
        transport: httpx.BaseTransport | None = None,
        trust_env: bool = True,
        headers: Mapping[str, str] | None = None,
    ) -> None:
        if retries < 0:
            raise ValueError("retries must be >= 0")
        self.url = url.rstrip("/")
        self.retries = retries
        self.backoff = backoff
        self.max_backoff = max_backoff
        self.auto_keys = auto_keys
        hdrs = {"User-Agent": USER_AGENT, "Accept": "application/json, application/problem+json"}
        if token:
            hdrs["Authorization"] = f"Bearer {token}"
        hdrs.update(headers or {})
        self._http = httpx.Client(base_url=self.url, timeout=timeout, headers=hdrs, transport=transport,
                                  trust_env=trust_env)

    # ------------------------------------------------------------ plumbing
    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"<leastwise Client {self.url}>"

    @staticmethod
    def _path(name: str, *rest: str | int) -> str:
        return "/v1/models/" + quote(name, safe="") + "".join("/" + quote(str(p), safe="") for p in rest)

    def _wait(self, attempt: int, hint: float | None) -> None:
        delay = hint if hint is not None else self.backoff * (2 ** attempt)
        _time.sleep(max(0.0, min(delay, self.max_backoff)))

    def _request(self, method: str, path: str, body: Any = None, *, policy: str = _SAFE,
                 headers: Mapping[str, str] | None = None) -> httpx.Response:
        content = None
        hdrs = dict(headers or {})
        if body is not None:
            content = json.dumps(body, default=_json_default, separators=(",", ":")).encode()
            hdrs["Content-Type"] = "application/json"
        attempt = 0
        while True:
            try:
                response = self._http.request(method, path, content=content, headers=hdrs)
            except _TRANSPORT_FAILURES as exc:
                retriable = policy == _SAFE or isinstance(exc, _CONNECT_FAILURES)
                if not retriable or attempt >= self.retries:
                    raise Unreachable(self.url, f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__) from exc
                self._wait(attempt, None)
                attempt += 1
                continue
            if response.status_code < 400 or response.status_code == 304:
                return response
            problem = self._problem(response)
            # these answers say nothing was applied: sending again is safe whatever the request
            if isinstance(problem, (ServiceUnavailable, TooManyRequests, Busy, RequestTimeout)) and attempt < self.retries:
                self._wait(attempt, problem.retry_after)
                attempt += 1
                continue
            if attempt > 0 and method == "DELETE" and isinstance(problem, NotFound):
                return response  # an earlier attempt deleted it and its answer was lost
            raise problem

    @staticmethod
    def _problem(response: httpx.Response) -> Problem:
        try:
            body = response.json()
        except ValueError:
            body = None
        return problem_from_response(response.status_code, response.headers, body, response.text)

    # ------------------------------------------------------------ service
    def health(self) -> dict[str, Any]:
        """``GET /healthz`` (raises :class:`Unreachable` when the service does not answer)."""
        return self._request("GET", "/healthz").json()

    # ------------------------------------------------------------ models
    def list_models(self) -> list[ModelInfo]:
        return [ModelInfo.from_json(m) for m in self._request("GET", "/v1/models").json()["models"]]

    def create_model(self, name: str, features: Sequence[str] | ModelConfig | Mapping[str, Any], *,
                     intercept: bool = True, forgetting: float = 1.0, half_life: float | None = None,
                     ridge: float = 0.0) -> ModelInfo:
        """Create a model (``PUT``); the same configuration again is fine, a different one raises :class:`Conflict`.

        ``features`` is the ordered list of feature names, or a whole config
        (a :class:`ModelConfig` or a JSON-style mapping; the keywords are then ignored).
        """
        if isinstance(features, ModelConfig):
            body: dict[str, Any] = features.to_json()
        elif isinstance(features, Mapping):
            body = dict(features)
        else:
            if isinstance(features, str):
                raise TypeError("features is a list of names, not one string")
            body = {"features": list(features), "intercept": intercept, "forgetting": forgetting,
                    "half_life": half_life, "ridge": ridge}
        response = self._request("PUT", self._path(name), body)
        return ModelInfo.from_json(response.json(), is_new=response.status_code == 201)

    def model(self, name: str) -> ModelState:
        """The model's state: coefficients by term, counts, sigma, identifiability, drift status."""
        response = self._request("GET", self._path(name))
        return ModelState.from_json(response.json(), response.headers.get("etag"))

    def model_if_changed(self, name: str, etag: str | None) -> ModelState | None:
        """Like :meth:`model`, but ``None`` when the state still has ``etag`` (a cheap 304 poll)."""
        response = self._request("GET", self._path(name), headers={"If-None-Match": etag} if etag else None)
        if response.status_code == 304:
            return None
        return ModelState.from_json(response.json(), response.headers.get("etag"))

    def delete_model(self, name: str) -> None:
        """Delete a model and all its history."""
        self._request("DELETE", self._path(name))

    # ------------------------------------------------------------ observations
    def _keys(self, readings: list[Reading], prefix: str | None) -> list[str | None]:
        if prefix is None:
            if not self.auto_keys:
                return [r.key for r in readings]
            prefix = "lw-" + uuid.uuid4().hex[:20]
        return [r.key if r.key is not None else f"{prefix}:{i}" for i, r in enumerate(readings)]

    def _policy(self, keys: list[str | None]) -> str:
        return _SAFE if all(k is not None for k in keys) else _SENT_ONLY

    def _post_observations(self, name: str, body: Any, keys: list[str | None], minimal: bool) -> ObservationAnswer:
        headers = _MINIMAL if minimal else None
        return ObservationAnswer.from_json(self._request("POST", self._path(name, "observations"), body,
                                                         policy=self._policy(keys), headers=headers).json())

    def observe(self, name: str, x: Inputs, y: float, *, time: TimeLike = None, key: str | None = None,
                minimal: bool = False) -> ObservationAnswer:
        """Send one reading; ``x`` in feature order or by feature name. ``answer.result`` has its residuals.

        ``minimal``: ask for the answer without the model (``Prefer: return=minimal``):
        ``coefficients`` is then empty and ``identifiable`` and ``sigma`` are ``None``;
        the service spends less on each answer.
        """
        r = Reading(x, y, time, key)
        keys = self._keys([r], None)
        return self._post_observations(name, _observation_json(r, keys[0]), keys, minimal)

    def observe_batch(self, name: str, readings: Iterable[ReadingLike], *, key_prefix: str | None = None,
                      minimal: bool = False) -> ObservationAnswer:
        """Send readings as one batch (applied in order, all or nothing).

        Readings without a key get ``<key_prefix>:<index>`` (a random prefix
        per call unless given: pass one to make keys repeatable across runs).
        ``minimal`` as in :meth:`observe`.
        """
        items = [_reading(r) for r in readings]
        if not items:
            raise ValueError("a batch needs at least one reading")
        keys = self._keys(items, key_prefix)
        body = {"observations": [_observation_json(r, k) for r, k in zip(items, keys)]}
        return self._post_observations(name, body, keys, minimal)

    def stream(self, name: str, readings: Iterable[ReadingLike], *, batch_size: int = 500,
               max_delay: float | None = None, key_prefix: str | None = None,
               minimal: bool = False) -> Iterator[ObservationAnswer]:
        """Send readings from any iterable in batches; yields each batch's answer.

        A batch is sent when it holds ``batch_size`` readings, when a new
        reading arrives ``max_delay`` seconds or more after the batch's first
        one, and at the end. Keys are ``<key_prefix>:<n>`` with ``n`` counting
        readings from 0 over the whole stream (random prefix unless given).
        ``minimal`` as in :meth:`observe`.
        """
        if batch_size < 1:
            raise ValueError("batch_size must be >= 1")
        if key_prefix is None and self.auto_keys:
            key_prefix = "lw-" + uuid.uuid4().hex[:20]
        buffer: list[Reading] = []
        started = 0.0
        index = 0

        def flush() -> ObservationAnswer:
            nonlocal buffer
            keys = [r.key if r.key is not None or key_prefix is None else f"{key_prefix}:{index - len(buffer) + i}"
                    for i, r in enumerate(buffer)]
            body = {"observations": [_observation_json(r, k) for r, k in zip(buffer, keys)]}
            buffer = []
            return self._post_observations(name, body, keys, minimal)

        for item in readings:
            now = _time.monotonic()
            if buffer and max_delay is not None and now - started >= max_delay:
                yield flush()
            if not buffer:
                started = now
            buffer.append(_reading(item))
            index += 1
            if len(buffer) >= batch_size:
                yield flush()
        if buffer:
            yield flush()

    # ------------------------------------------------------------ reads
    def predict(self, name: str, x: Inputs, *, level: float | None = None) -> Prediction:
        """Prediction at one input, with the interval at ``level`` (service default 0.95)."""
        body: dict[str, Any] = {"x": _x_json(x)}
        if level is not None:
            body["level"] = level
        return Prediction.from_json(self._request("POST", self._path(name, "predict"), body).json())

    def predict_rows(self, name: str, rows: Iterable[Inputs], *, level: float | None = None) -> list[Prediction]:
        """Predictions at several inputs in one request."""
        body: dict[str, Any] = {"rows": [_x_json(r) for r in rows]}
        if level is not None:
            body["level"] = level
        out = self._request("POST", self._path(name, "predict"), body).json()
        return [Prediction.from_json(p, out) for p in out["predictions"]]

    def drift(self, name: str) -> DriftReport:
        return DriftReport.from_json(self._request("GET", self._path(name, "drift")).json())

    def covariance(self, name: str) -> Covariance:
        return Covariance.from_json(self._request("GET", self._path(name, "covariance")).json())

    # ------------------------------------------------------------ whole-state changes
    def reset(self, name: str) -> StateChange:
        """Back to the prior (the configuration stays)."""
        return StateChange.from_json(self._request("POST", self._path(name, "reset")).json())

    def snapshot(self, name: str, label: str | None = None) -> Snapshot:
        """Keep the current state under a new snapshot id."""
        body = {"label": label} if label is not None else None
        return Snapshot.from_json(self._request("POST", self._path(name, "snapshots"), body, policy=_SENT_ONLY).json())

    def snapshots(self, name: str) -> list[Snapshot]:
        return [Snapshot.from_json(s) for s in self._request("GET", self._path(name, "snapshots")).json()["snapshots"]]

    def restore(self, name: str, snapshot_id: int) -> StateChange:
        """The model's state becomes the snapshot's."""
        return StateChange.from_json(self._request("POST", self._path(name, "snapshots", snapshot_id, "restore")).json())

    def delete_snapshot(self, name: str, snapshot_id: int) -> None:
        self._request("DELETE", self._path(name, "snapshots", snapshot_id))
