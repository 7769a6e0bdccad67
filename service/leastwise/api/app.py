"""The FastAPI application: routes, problem handlers, request log, registry on ``app.state``."""

from __future__ import annotations

import inspect

from fastapi import FastAPI

from leastwise import __version__
from leastwise.models import Registry
from leastwise.settings import Settings
from leastwise.store import Store

from .auth import install_access
from .fastlane import FastLane, LaneApp
from .metrics import attach as attach_metrics
from .middleware import RequestLog
from .problems import install_handlers
from .routes import router

__all__ = ["create_app", "build_registry", "framework_options"]


def build_registry(settings: Settings) -> Registry:
    """Open the database (running migrations) and make the registry."""
    store = Store.open(settings.database, pool_size=settings.pool_size, background_checkpoints=True)
    return Registry(store, checkpoint_every=settings.checkpoint_every, compact_log=settings.compact_log,
                    max_batch=settings.max_batch, group_commit=settings.group_commit, max_group=settings.max_group,
                    group_gather=settings.group_gather_us / 1e6)


def framework_options() -> dict:
    """FastAPI options beyond the defaults: its built-in OpenTelemetry hooks off (the service does not
    export traces, and their check costs ~10 us per request), where this FastAPI has them."""
    if "telemetry" in inspect.signature(FastAPI.__init__).parameters:
        return {"telemetry": {"tracing": False, "metrics": False, "logs": False}}
    return {}


def create_app(settings: Settings | None = None, registry: Registry | None = None) -> FastAPI:
    """The ASGI app. Without ``registry`` one is built from ``settings`` (the database is opened now)."""
    settings = settings or Settings.from_env()
    registry = registry or build_registry(settings)
    app = LaneApp(title="leastwise", version=__version__, docs_url="/docs", redoc_url=None, **framework_options())
    app.state.settings = settings
    app.state.registry = registry
    app.state.serialised = {}  # GET bodies' JSON per model (routes._body_bytes)
    # Fresh GETs may be answered on the event loop only where the version check is local (SQLite).
    app.state.inline_reads = registry.store.engine.dialect.name == "sqlite"
    install_handlers(app)
    app.include_router(router)
    app.add_middleware(FastLane)  # innermost: after tokens and logging, before the router
    install_access(app, settings, registry.store)  # tokens, scopes, audit (api/auth.py)
    app.add_middleware(RequestLog, tally=attach_metrics(app, registry), lines=settings.request_log)  # GET /v1/metrics (api/metrics.py)
    return app
