"""leastwise.api: HTTP routes, body decoding and RFC 9457 problem details."""

from .app import build_registry, create_app
from .problems import Problem

__all__ = ["create_app", "build_registry", "Problem"]
