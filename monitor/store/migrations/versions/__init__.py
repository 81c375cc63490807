"""Alembic revisions, oldest first by their number."""
