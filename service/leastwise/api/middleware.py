"""One structured log line per request and its count for the metrics (pure ASGI, so it costs little)."""

from __future__ import annotations

import logging
import time
from typing import Any

from leastwise.logging import request_logger

from .metrics import HttpTally

__all__ = ["RequestLog"]


class RequestLog:
    """Logs method, path, status, duration (ms), the model name and the client address; never bodies or headers.

    With a ``tally`` every response is also counted there (``api/metrics.py``).
    ``lines`` (the ``request_log`` setting): ``"all"`` logs every request at
    level info (5xx at warning), ``"errors"`` only answers of status 400 and
    above, ``"off"`` none. A line costs ~10 us of the event loop's time in one
    process; over HTTP, single POSTs at 16 connections spent ~23 us more CPU a
    request with a line each than with ``errors`` and ran ~6 % slower (six
    alternating pairs, README Performance), so a gateway fleet at thousands of
    posts a second may want ``errors``. The metrics count every answer whatever
    the choice.
    """

    def __init__(self, app: Any, tally: HttpTally | None = None, lines: str = "all") -> None:
        self.app = app
        self.tally = tally
        self.min_status = {"all": 0, "errors": 400}.get(lines, 1000)  # "off": no status reaches it

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500

        async def _send(message: dict) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, _send)
        finally:
            seconds = time.perf_counter() - start
            if self.tally is not None:
                self.tally.count(scope.get("method", ""), scope.get("path", ""), status, seconds)
            if status >= self.min_status and request_logger.isEnabledFor(logging.INFO):
                path = scope.get("path", "")
                parts = path.split("/")
                extra = {
                    "method": scope.get("method"),
                    "path": path,
                    "status": status,
                    "duration_ms": round(seconds * 1000.0, 3),
                    "client": (scope.get("client") or ("", 0))[0],
                }
                if len(parts) > 3 and parts[1] == "v1" and parts[2] == "models":
                    extra["model"] = parts[3]
                level = logging.WARNING if status >= 500 else logging.INFO
                request_logger.log(level, "request", extra=extra)
