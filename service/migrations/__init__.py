"""Alembic migrations of the service's schema (run by `heedful db upgrade` and at start)."""
