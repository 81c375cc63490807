"""Real databases for the storage tests: a SQLite file, or a fresh PostgreSQL database.

PostgreSQL runs on 127.0.0.1:5432 with trust authentication. Each database created here has a
unique name and is dropped afterwards; an unreachable server makes the test fail, not skip.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import psycopg
from psycopg import sql
from sqlalchemy import Table, create_engine, select
from sqlalchemy.pool import NullPool

POSTGRES_ADMIN = "host=127.0.0.1 port=5432 user=postgres dbname=postgres"


@dataclass(frozen=True)
class Database:
    """A database under test: the URL an operator would write and a synchronous URL for checks."""

    url: str
    check_url: str

    def rows(self, table: Table) -> list[dict[str, object]]:
        """Every row of ``table`` as a dict, read outside the store."""
        engine = create_engine(self.check_url, poolclass=NullPool)
        try:
            with engine.connect() as conn:
                return [dict(row._mapping) for row in conn.execute(select(table))]
        finally:
            engine.dispose()

    def count(self, table: Table) -> int:
        """How many rows ``table`` holds, read outside the store."""
        return len(self.rows(table))


def sqlite_database(path: Path) -> Database:
    return Database(url=f"sqlite:///{path}", check_url=f"sqlite:///{path}")


@contextmanager
def postgres_database() -> Iterator[Database]:
    """An empty PostgreSQL database with a unique name, dropped on exit."""
    name = f"monitor_store_test_{uuid.uuid4().hex[:16]}"
    with psycopg.connect(POSTGRES_ADMIN, autocommit=True) as admin:
        admin.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    try:
        yield Database(
            url=f"postgresql://postgres@127.0.0.1:5432/{name}",
            check_url=f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}",
        )
    finally:
        with psycopg.connect(POSTGRES_ADMIN, autocommit=True) as admin:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name)))
