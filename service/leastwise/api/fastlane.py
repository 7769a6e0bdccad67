"""The two hot routes, answered without walking the router.

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
"""

from __future__ import annotations

from typing import Any

from starlette.requests import Request

from .problems import exception_response
from .routes import model_state, observe

__all__ = ["FastLane"]

_PREFIX = "/v1/models/"
_SUFFIX = "/observations"


class FastLane:
    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] == "http":
            path: str = scope["path"]
            if path.startswith(_PREFIX):
                rest = path[len(_PREFIX):]
                method = scope["method"]
                if method == "POST" and rest.endswith(_SUFFIX):
                    name = rest[: -len(_SUFFIX)]
                    if name and "/" not in name:
                        await self._answer(observe, name, scope, receive, send)
                        return
                elif method == "GET" and rest and "/" not in rest:
                    await self._answer(model_state, rest, scope, receive, send)
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
