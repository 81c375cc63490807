"""Alembic migrations of the monitor's database (script location ``monitor.store:migrations``)."""
