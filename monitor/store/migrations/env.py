"""Alembic's entry point: migrate the database whose URL is in ``config.attributes["url"]``.

The store sets that attribute (a synchronous SQLAlchemy URL) and runs ``upgrade head`` in a
worker thread; there is no ``alembic.ini``. SQLite gets ``render_as_batch`` so that later
migrations can alter tables by copy-and-move.
"""

from __future__ import annotations

from alembic import context
from sqlalchemy import create_engine, pool

from monitor.store.schema import metadata


def run_migrations() -> None:
    """Run the pending migrations in one connection (one transaction on PostgreSQL)."""
    engine = create_engine(context.config.attributes["url"], poolclass=pool.NullPool)
    try:
        with engine.connect() as connection:
            context.configure(
                connection=connection,
                target_metadata=metadata,
                render_as_batch=connection.dialect.name == "sqlite",
            )
            with context.begin_transaction():
                context.run_migrations()
    finally:
        engine.dispose()


run_migrations()
