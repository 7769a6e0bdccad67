"""Service settings: command-line options over ``LEASTWISE_*`` environment variables over defaults.

| setting | env variable | default |
|---|---|---|
| host | ``LEASTWISE_HOST`` | ``127.0.0.1`` (loopback only until access tokens exist) |
| port | ``LEASTWISE_PORT`` | ``8622`` |
| database | ``LEASTWISE_DATABASE`` | ``sqlite:///leastwise.sqlite3`` in the working folder |
| checkpoint_every | ``LEASTWISE_CHECKPOINT_EVERY`` | ``1000`` observations between checkpoints |
| compact_log | ``LEASTWISE_COMPACT_LOG`` | ``false``: keep the whole observation log |
| max_body_bytes | ``LEASTWISE_MAX_BODY_BYTES`` | ``1048576`` (1 MiB) |
| max_batch | ``LEASTWISE_MAX_BATCH`` | ``10000`` observations or prediction rows per request |
| log_level | ``LEASTWISE_LOG_LEVEL`` | ``info`` |
| request_log | ``LEASTWISE_REQUEST_LOG`` | ``all``: one line per request at level info; ``errors``: only answers of status 400 and above; ``off``: none (the metrics count every answer either way) |
| tls_cert, tls_key | ``LEASTWISE_TLS_CERT``, ``LEASTWISE_TLS_KEY`` | none: plain HTTP; both set: HTTPS (PEM files, handed to uvicorn) |
| limit_concurrency | ``LEASTWISE_LIMIT_CONCURRENCY`` | ``4096`` connections or requests in flight; beyond: 503 (``0``: no limit) |
| timeout_keep_alive | ``LEASTWISE_TIMEOUT_KEEP_ALIVE`` | ``5`` seconds an idle keep-alive connection stays open |
| body_timeout | ``LEASTWISE_BODY_TIMEOUT`` | ``30`` seconds to receive a whole request body; slower: 408 |
| pool_size | ``LEASTWISE_POOL_SIZE`` | ``8`` database connections kept open (plus overflow) |
| group_commit | ``LEASTWISE_GROUP_COMMIT`` | ``true``: observation requests that arrive while a commit is in flight share the next transaction |
| max_group | ``LEASTWISE_MAX_GROUP`` | ``256`` requests at most per group transaction |
| group_gather_us | ``LEASTWISE_GROUP_GATHER_US`` | ``500`` microseconds at most the writer waits for the event loop to queue the requests it has in hand before a small group (``0``: never; see models/writer.py) |
| threads | ``LEASTWISE_THREADS`` | ``64`` worker threads for blocking work (model loads, PostgreSQL reads, operator actions; observation requests wait on the event loop) |
"""

from __future__ import annotations

import os
from dataclasses import dataclass, fields, replace
from typing import Any

__all__ = ["Settings", "DEFAULT_DATABASE", "LIMIT_BODY_BYTES", "LIMIT_BATCH", "REQUEST_LOG_CHOICES"]

DEFAULT_DATABASE = "sqlite:///leastwise.sqlite3"
LIMIT_BODY_BYTES = 1 << 20
LIMIT_BATCH = 10_000

#: What the request log writes (see api/middleware.py): every request, answers of status >= 400, nothing.
REQUEST_LOG_CHOICES = ("all", "errors", "off")

_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


@dataclass(frozen=True, slots=True)
class Settings:
    """Everything the service reads at start-up."""

    host: str = "127.0.0.1"
    port: int = 8622
    database: str = DEFAULT_DATABASE
    checkpoint_every: int = 1000
    compact_log: bool = False
    max_body_bytes: int = LIMIT_BODY_BYTES
    max_batch: int = LIMIT_BATCH
    log_level: str = "info"
    request_log: str = "all"
    tls_cert: str = ""
    tls_key: str = ""
    limit_concurrency: int = 4096
    timeout_keep_alive: int = 5
    body_timeout: int = 30
    pool_size: int = 8
    group_commit: bool = True
    max_group: int = 256
    group_gather_us: int = 500
    threads: int = 64

    def __post_init__(self) -> None:
        if not 1 <= self.port <= 65535:
            raise ValueError("port must be in 1..65535")
        if self.checkpoint_every < 1:
            raise ValueError("checkpoint_every must be >= 1")
        if self.max_body_bytes < 1024:
            raise ValueError("max_body_bytes must be >= 1024")
        if self.max_batch < 1:
            raise ValueError("max_batch must be >= 1")
        if self.pool_size < 1:
            raise ValueError("pool_size must be >= 1")
        if bool(self.tls_cert) != bool(self.tls_key):
            raise ValueError("TLS needs both a certificate (--tls-cert) and its key (--tls-key)")
        if self.limit_concurrency < 0 or self.timeout_keep_alive < 1 or self.body_timeout < 1:
            raise ValueError("limit_concurrency must be >= 0, timeout_keep_alive and body_timeout >= 1")
        if self.max_group < 1:
            raise ValueError("max_group must be >= 1")
        if not 0 <= self.group_gather_us <= 100_000:
            raise ValueError("group_gather_us must be in 0..100000")
        if self.threads < 1:
            raise ValueError("threads must be >= 1")
        if self.request_log not in REQUEST_LOG_CHOICES:
            raise ValueError(f"request_log must be one of {', '.join(REQUEST_LOG_CHOICES)}, got {self.request_log!r}")

    @classmethod
    def from_env(cls, environ: dict[str, str] | None = None, **overrides: Any) -> "Settings":
        """Read ``LEASTWISE_<FIELD>`` variables; keyword overrides that are not ``None`` win."""
        env = os.environ if environ is None else environ
        values: dict[str, Any] = {}
        for f in fields(cls):
            raw = env.get(f"LEASTWISE_{f.name.upper()}")
            if raw is None:
                continue
            values[f.name] = _convert(f.name, f.type, raw)
        values.update({k: v for k, v in overrides.items() if v is not None})
        return cls(**values)

    def with_(self, **changes: Any) -> "Settings":
        return replace(self, **changes)


def _convert(name: str, kind: Any, raw: str) -> Any:
    kind = kind if isinstance(kind, str) else getattr(kind, "__name__", str(kind))
    if kind == "int":
        try:
            return int(raw)
        except ValueError:
            raise ValueError(f"LEASTWISE_{name.upper()} must be an integer, got {raw!r}") from None
    if kind == "bool":
        low = raw.strip().lower()
        if low in _TRUE:
            return True
        if low in _FALSE:
            return False
        raise ValueError(f"LEASTWISE_{name.upper()} must be true or false, got {raw!r}")
    return raw
