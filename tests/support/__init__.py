"""Shared test infrastructure: throwaway PostgreSQL and real server processes.

Fixtures are registered in ``tests/conftest.py``; the helpers can also be
imported directly::

    from tests.support.server import LeastwiseServer
    from tests.support.postgres import PostgresServer, free_port
"""

from .postgres import PostgresServer, PostgresUnavailable, ThrowawayCluster, free_port, in_ci
from .server import LeastwiseServer, ServerStartError

__all__ = [
    "LeastwiseServer",
    "PostgresServer",
    "PostgresUnavailable",
    "ServerStartError",
    "ThrowawayCluster",
    "free_port",
    "in_ci",
]
