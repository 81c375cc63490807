"""Opening a database: the migration builds the schema, and opening again changes nothing."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import create_engine, inspect, text
from sqlalchemy.pool import NullPool

from monitor.store import Store, StoreError, schema
from tests.store.databases import Database, sqlite_database
from tests.store.samples import full_batch

TABLES = {"charts", "limits", "subgroups", "signals", "alerts", "acks", "checkpoints"}


def _inspect_tables(database: Database) -> tuple[set[str], str | None, list[object]]:
    """Table names, alembic revision and differences from ``schema.metadata``, read outside the store."""
    engine = create_engine(database.check_url, poolclass=NullPool)
    try:
        with engine.connect() as conn:
            names = set(inspect(conn).get_table_names())
            revision = MigrationContext.configure(conn).get_current_revision()
            differences = compare_metadata(MigrationContext.configure(conn), schema.metadata)
    finally:
        engine.dispose()
    return names, revision, differences


async def test_opening_an_empty_database_creates_every_table(database):
    """Store.open on an empty database creates the seven tables and records the latest revision."""
    store = await Store.open(database.url)
    await store.close()
    names, revision, _ = _inspect_tables(database)
    assert names == TABLES | {"alembic_version"}
    assert revision == "0002_subgroup_readings"


async def test_the_migration_builds_exactly_the_tables_the_store_uses(database):
    """Comparing the migrated database with schema.metadata finds no difference."""
    store = await Store.open(database.url)
    await store.close()
    _, _, differences = _inspect_tables(database)
    assert differences == []


async def test_opening_a_database_twice_keeps_its_data(database):
    """A second Store.open migrates nothing and loses nothing written after the first."""
    async with await Store.open(database.url) as store:
        await store.commit(full_batch("press-1/bore"))
    async with await Store.open(database.url) as store:
        assert await store.subgroup_count("press-1/bore") == 2
        assert await store.ping() >= 0.0
    names, revision, _ = _inspect_tables(database)
    assert names == TABLES | {"alembic_version"}
    assert revision == "0002_subgroup_readings"


async def test_opening_without_migrating_leaves_an_empty_database_empty(database):
    """Store.open(migrate=False) connects but creates no table."""
    store = await Store.open(database.url, migrate=False)
    await store.close()
    names, _, _ = _inspect_tables(database)
    assert names == set()


async def test_a_database_from_an_unknown_newer_schema_is_refused(database):
    """A revision this program does not know makes Store.open raise StoreError naming it."""
    store = await Store.open(database.url)
    await store.close()
    engine = create_engine(database.check_url, poolclass=NullPool)
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = 'from_the_future'"))
    engine.dispose()
    with pytest.raises(StoreError, match="from_the_future"):
        await Store.open(database.url)


async def test_sqlite_runs_with_write_ahead_logging_foreign_keys_and_a_busy_timeout(tmp_path: Path):
    """The store's SQLite connections use WAL, synchronous=NORMAL, foreign keys and a busy timeout."""
    database = sqlite_database(tmp_path / "monitor.db")
    async with await Store.open(database.url) as store, store._engine.connect() as conn:
        pragmas = {
            name: (await conn.exec_driver_sql(f"PRAGMA {name}")).scalar()
            for name in ("journal_mode", "synchronous", "foreign_keys", "busy_timeout")
        }
    assert pragmas == {"journal_mode": "wal", "synchronous": 1, "foreign_keys": 1, "busy_timeout": 5000}
    with sqlite3.connect(tmp_path / "monitor.db") as plain:
        assert plain.execute("PRAGMA journal_mode").fetchone() == ("wal",)
