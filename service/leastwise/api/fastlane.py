"""The two hot routes, answered without walking the router or the framework's outer layers.

Gateways post observations and dashboards poll model states many thousand
times a second; matching a path against every route of the application costs
about as much as the rest of such a request. :class:`FastLane` sits inside the
access and request-log middleware (tokens, scopes and logging apply as
everywhere) and hands exactly

* ``POST /v1/models/{name}/observations`` and
* ``GET /v1/models/{name}``

to the same handlers the router would call (:func:`.routes.observe`,
:func:`.routes.model_state`), rendering errors with the application's own
problem handlers (:func:`.problems.exception_response`). Every other request,
including other methods on these paths, goes on to the router.

The framework's own outer layers (its server-error handler, exception
telemetry and body-size limit, which FastAPI puts around every application)
cost a hot request ~20-30 us of the event loop's ~100 (in one process, 15
posts in flight, medians of five runs). :class:`LaneApp` enters the hot routes
below them, at the request log (:func:`lane_entry`): telemetry is off
(``framework_options``), the service limits bodies itself (``read_json``), and
:meth:`LaneApp.enter_lane` answers an unexpected error with the same problem
document the server-error layer would.
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from starlette.requests import Request

from .middleware import RequestLog
from .problems import exception_response
from .routes import model_state, observe

__all__ = ["FastLane", "LaneApp", "hot_route", "lane_entry"]

_PREFIX = "/v1/models/"
_SUFFIX = "/observations"


def hot_route(scope: dict) -> tuple[Any, str] | None:
    """``(handler, model name)`` when an HTTP scope is one of the two hot routes, else None."""
    path: str = scope["path"]
    if path.startswith(_PREFIX):
        rest = path[len(_PREFIX):]
        method = scope["method"]
        if method == "POST" and rest.endswith(_SUFFIX):
            name = rest[: -len(_SUFFIX)]
            if name and "/" not in name:
                return observe, name
        elif method == "GET" and rest and "/" not in rest:
            return model_state, rest
    return None


class FastLane:
    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] == "http":
            hot = hot_route(scope)
            if hot is not None:
                await self._answer(hot[0], hot[1], scope, receive, send)
                return
        await self.app(scope, receive, send)

    @staticmethod
    async def _answer(handler: Any, name: str, scope: dict, receive: Any, send: Any) -> None:
        request = Request(scope, receive)
        try:
            response = await handler(name, request)
        except Exception as exc:  # noqa: BLE001 - rendered exactly as the router's handlers would
            response = await exception_response(request, exc)
        await response(scope, receive, send)


#: The layers FastAPI puts around every application that the hot routes may skip (see the module docstring).
_OUTER_LAYERS = frozenset({"ServerErrorMiddleware", "ExceptionTelemetryMiddleware", "AppBodyLimitMiddleware"})


def lane_entry(app: FastAPI) -> Any:
    """The request-log layer of ``app``'s middleware stack (built now if need be) when only
    :data:`_OUTER_LAYERS` lie above it and no framework body limit is set; else None."""
    if getattr(app, "max_body_size", None) is not None:
        return None
    if app.middleware_stack is None:
        app.middleware_stack = app.build_middleware_stack()
    layer = app.middleware_stack
    while type(layer).__name__ in _OUTER_LAYERS:
        layer = getattr(layer, "app", None)
    return layer if isinstance(layer, RequestLog) else None


class LaneApp(FastAPI):
    """The service's FastAPI application: the hot routes enter its stack at :func:`lane_entry`."""

    _lane: Any = None  # the entry once looked up; False: there is none, every request takes the full stack

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] == "http" and hot_route(scope) is not None:
            lane = self._lane
            if lane is None:
                lane = self._lane = lane_entry(self) or False
            if lane:
                if self.root_path:
                    scope["root_path"] = self.root_path
                scope["app"] = self
                await self.enter_lane(lane, scope, receive, send)
                return
        await super().__call__(scope, receive, send)

    @staticmethod
    async def enter_lane(lane: Any, scope: dict, receive: Any, send: Any) -> None:
        """Run ``lane``; an error that escapes it gets the problem document of the application's handlers,
        as the server-error layer would give it (FastLane renders the handlers' own errors itself)."""
        try:
            await lane(scope, receive, send)
        except Exception as exc:  # noqa: BLE001 - answered like any unexpected error
            response = await exception_response(Request(scope, receive), exc)
            try:
                await response(scope, receive, send)
            except RuntimeError:  # the response had started: the error was logged by its handler
                pass
