"""leastwise: exact streaming least-squares models per machine, served over HTTP."""

__version__ = "0.1.0"
