"""Fixtures: every test taking ``database`` or ``store`` runs on SQLite and on PostgreSQL."""

from __future__ import annotations

from collections.abc import AsyncIterator, Iterator
from pathlib import Path

import pytest

from monitor.store import Store
from tests.store.databases import Database, postgres_database, sqlite_database


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.db)])
def database(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Database]:
    if request.param == "sqlite":
        yield sqlite_database(tmp_path / "monitor.db")
    else:
        with postgres_database() as fresh:
            yield fresh


@pytest.fixture
async def store(database: Database) -> AsyncIterator[Store]:
    opened = await Store.open(database.url)
    try:
        yield opened
    finally:
        await opened.close()
