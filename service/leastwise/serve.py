"""Running the service: the loopback check and uvicorn."""

from __future__ import annotations

import asyncio
import gc
import ipaddress
import logging
import socket

from leastwise.collector import CollectorPolicy
from leastwise.logging import mask_url, setup_logging
from leastwise.settings import Settings

__all__ = ["is_loopback", "run", "LoopbackOnly"]

log = logging.getLogger("leastwise.serve")


class LoopbackOnly(ValueError):
    """Binding a non-loopback address was refused."""


def is_loopback(host: str) -> bool:
    """True when every address ``host`` stands for is a loopback address."""
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        pass
    try:
        infos = socket.getaddrinfo(host, None)
    except socket.gaierror:
        return False
    return bool(infos) and all(ipaddress.ip_address(i[4][0].split("%")[0]).is_loopback for i in infos)


def active_tokens(database: str) -> int:
    """Unrevoked access tokens in ``database``; 0 for a database (or SQLite file) that does not exist yet."""
    from pathlib import Path

    from sqlalchemy.engine import make_url

    from leastwise.store import Store
    from leastwise.store.tokens import count_active

    url = make_url(database)
    if url.get_backend_name() == "sqlite":
        path = url.database or ""
        if not path or path == ":memory:" or (not path.startswith("file:") and not Path(path).expanduser().exists()):
            return 0  # never create a database just to find it empty
    store = Store.open(database, pool_size=1, run_migrations=False)
    try:
        with store.read() as conn:
            return count_active(conn)
    except Exception:  # noqa: BLE001 - no tokens table yet (an older schema): no tokens
        return 0
    finally:
        store.close()


def check_host(host: str, database: str | None = None) -> None:
    """Refuse a non-loopback address unless ``database`` holds an unrevoked access token."""
    if is_loopback(host):
        return
    if database is not None and active_tokens(database) > 0:
        return
    where = f" --database {mask_url(database)}" if database else ""
    raise LoopbackOnly(
        f"refusing to listen on {host!r}: no access token exists, and without tokens leastwise serves "
        "loopback only (127.0.0.1, ::1 or localhost). Create an admin token first with\n"
        f"    leastwise token create{where} --scope admin --label operator\n"
        "(it is printed once), give gateways and dashboards their own write/read tokens, then start again. "
        "Or keep loopback and put a reverse proxy with TLS and authentication in front (deploy/README.md)."
    )


def single_threaded_blas() -> None:
    """Keep BLAS and LAPACK to the calling thread.

    The service's concurrency is its own (the event loop and the writer thread);
    its matrices are at most 129 x 129. Left to itself, OpenBLAS runs products
    and triangular solves from d = 64 up on extra threads that spin while they
    wait: at d = 64 that doubled the CPU per observation POST (537 against 266 us,
    ``tests/bench/service.py``).
    """
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")


def run(settings: Settings) -> None:
    """Open the database (migrating it) and serve until interrupted."""
    import uvicorn

    from leastwise.api import create_app

    check_host(settings.host, settings.database)
    setup_logging(settings.log_level)
    single_threaded_blas()
    app = create_app(settings)
    # Everything built so far (the framework, the schemas, the routes) lives as long as the process:
    # move it out of the collector's sight, so full collections stay short under load (p99).
    gc.collect()
    gc.freeze()
    log.info("serving", extra={"host": settings.host, "port": settings.port, "database": mask_url(settings.database),
                               "checkpoint_every": settings.checkpoint_every, "compact_log": settings.compact_log,
                               "group_commit": settings.group_commit, "threads": settings.threads})
    loop, http = fast_loop_and_parser()
    config = uvicorn.Config(
        _ThreadLimit(app, settings.threads),
        host=settings.host,
        port=settings.port,
        access_log=False,
        log_config=None,
        loop=loop,
        http=http,
        backlog=2048,
        timeout_graceful_shutdown=5,
        server_header=False,
        date_header=False,
        # hardening and TLS (issue 6; see deploy/README.md)
        limit_concurrency=settings.limit_concurrency or None,
        timeout_keep_alive=settings.timeout_keep_alive,
        h11_max_incomplete_event_size=16 * 1024,
        ssl_certfile=settings.tls_cert or None,
        ssl_keyfile=settings.tls_key or None,
    )
    uvicorn.Server(config).run()


def fast_loop_and_parser() -> tuple[str, str]:
    """uvloop and httptools when installed (they are dependencies on Linux), else uvicorn's pure-Python fallbacks.

    One process serves a database: the registry keeps each model in memory and
    one writer thread groups the commits, so more worker processes would only
    fight over the same rows (see README, Performance).
    """
    import importlib.util

    loop = "uvloop" if importlib.util.find_spec("uvloop") is not None else "asyncio"
    http = "httptools" if importlib.util.find_spec("httptools") is not None else "h11"
    return loop, http


class _ThreadLimit:
    """Starts what needs the running event loop: the worker-thread pool size and the collector policy.

    Observation requests wait for their group commit on the event loop; the
    other blocking work (loads, reads on PostgreSQL, operator actions) runs in
    worker threads, and anyio's default of 40 would cap those in flight below
    the connections a gateway fleet keeps open. The collector policy
    (:mod:`leastwise.collector`) keeps garbage-collection pauses short with
    many models in memory.
    """

    def __init__(self, app, threads: int) -> None:  # noqa: ANN001
        self.app = app
        self.threads = threads
        self._set = False
        self.collector = CollectorPolicy()
        self._task: asyncio.Task | None = None

    def __getattr__(self, name: str):  # noqa: ANN204 - state, routes etc. of the wrapped app
        return getattr(self.app, name)

    async def __call__(self, scope, receive, send) -> None:  # noqa: ANN001
        if not self._set:
            import anyio.to_thread

            anyio.to_thread.current_default_thread_limiter().total_tokens = self.threads
            self._task = asyncio.get_running_loop().create_task(self.collector.run())
            self._set = True
        await self.app(scope, receive, send)
