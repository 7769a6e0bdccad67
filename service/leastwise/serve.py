"""Running the service: the loopback check and uvicorn."""

from __future__ import annotations

import ipaddress
import logging
import socket

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


def check_host(host: str) -> None:
    if not is_loopback(host):
        raise LoopbackOnly(
            f"refusing to listen on {host!r}: without access tokens leastwise serves loopback only "
            "(127.0.0.1, ::1 or localhost). Put a reverse proxy with authentication in front, "
            "or wait for the access-control release."
        )


def run(settings: Settings) -> None:
    """Open the database (migrating it) and serve until interrupted."""
    import uvicorn

    from leastwise.api import create_app

    check_host(settings.host)
    setup_logging(settings.log_level)
    app = create_app(settings)
    log.info("serving", extra={"host": settings.host, "port": settings.port, "database": mask_url(settings.database),
                               "checkpoint_every": settings.checkpoint_every, "compact_log": settings.compact_log})
    config = uvicorn.Config(
        app,
        host=settings.host,
        port=settings.port,
        access_log=False,
        log_config=None,
        loop="auto",
        http="auto",
        timeout_graceful_shutdown=5,
        server_header=False,
    )
    uvicorn.Server(config).run()
