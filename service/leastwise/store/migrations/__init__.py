"""Alembic migrations of the leastwise schema, shipped with the package and run on start."""
