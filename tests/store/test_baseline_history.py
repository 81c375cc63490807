"""Baselines from stored history and limits versions, on SQLite and PostgreSQL."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.baseline import estimate_baseline, save, stored_subgroups
from monitor.config import load_config_text
from monitor.spc import SubgroupBatch, constants
from monitor.store import CommitBatch, LimitsRow, Store, SubgroupRow, schema
from tests.spc.data import PISTON_RING_DIAMETERS
from tests.store.samples import T0
from tests.test_replay import PISTON_CONFIG

CHART = "piston-rings/inside-diameter"


def _rows(start_index: int = 0) -> list[SubgroupRow]:
    """The piston-ring subgroups as the daemon stores them, a minute apart, with their readings."""
    return [
        SubgroupRow(
            chart=CHART,
            index=start_index + i,
            start_ms=T0 + 60_000 * i,
            end_ms=T0 + 60_000 * i + 59_000,
            n=5,
            points={} if i < 5 else {"xbar_r": {"mean": {"value": float(np.mean(values))}}},
            values=values,
        )
        for i, values in enumerate(PISTON_RING_DIAMETERS)
    ]


async def test_readings_round_trip_through_the_store(store):
    """Each subgroup's readings come back exactly, in order; rows without them read as None."""
    rows = _rows()
    bare = SubgroupRow(CHART, 99, T0, T0, 5, {"xbar_r": {}})
    await store.commit(CommitBatch(subgroups=[*rows, bare]))
    back = await store.subgroups_for(CHART)
    assert [r.values for r in back[:-1]] == [r.values for r in rows]
    assert back[-1].values is None
    window = await store.subgroups_for(CHART, since_ms=T0 + 60_000 * 3, until_ms=T0 + 60_000 * 6)
    assert [r.index for r in window] == [3, 4, 5]


async def test_a_baseline_from_stored_history_equals_the_book(store):
    """Montgomery Example 6.1 stored by the daemon gives x-double-bar 74.001 and R-bar/d2 from the store."""
    await store.commit(CommitBatch(subgroups=_rows(start_index=40)))
    batch, indices, missing = await stored_subgroups(store, CHART)
    assert (len(batch), missing) == (25, 0)
    assert indices == list(range(40, 65))
    chart = load_config_text(PISTON_CONFIG, "pistons.yaml").charts[0]
    result = estimate_baseline(chart, batch, source="stored history", indices=indices, fit=False)
    assert result.estimate.parameters.mean == pytest.approx(74.001, abs=5e-4)
    assert result.estimate.parameters.sigma * constants(5).d2 == pytest.approx(0.023, abs=5e-4)
    # same numbers as from the readings directly
    direct = estimate_baseline(
        chart, SubgroupBatch.from_rows(PISTON_RING_DIAMETERS), source="rows", fit=False
    )
    assert result.estimate.parameters == direct.estimate.parameters


async def test_saved_baselines_become_new_versions_and_all_are_kept(store, database):
    """Each save takes the next version; every version stays stored; the latest is read in one query."""
    chart = load_config_text(PISTON_CONFIG, "pistons.yaml").charts[0]
    await store.commit(
        CommitBatch(limits=[LimitsRow(CHART, 1, 74.0, 0.01, "standard", {}, T0)], subgroups=_rows())
    )
    batch, indices, _ = await stored_subgroups(store, CHART, first=10)
    first = estimate_baseline(chart, batch, source="stored history", indices=indices, fit=False)
    saved = await save(store, first)
    batch, indices, _ = await stored_subgroups(store, CHART)
    second = estimate_baseline(chart, batch, source="stored history", indices=indices, fit=False)
    again = await save(store, second)
    assert (saved.version, again.version) == (2, 3)
    history = await store.limits_history(CHART)
    assert [(r.version, r.source) for r in history] == [(1, "standard"), (2, "baseline"), (3, "baseline")]
    assert history[1].mean == pytest.approx(float(np.mean(PISTON_RING_DIAMETERS[:10])), rel=1e-12)
    assert history[2].detail["subgroups"] == [0, 24]
    latest = await store.latest_limits_all()
    assert latest[CHART].version == 3
    assert await store.latest_limits_all(["elsewhere/none"]) == {}
    assert database.count(schema.limits) == 3


async def test_two_writers_never_share_a_version(database):
    """Concurrent saves through two connections get distinct consecutive versions."""
    import asyncio  # noqa: PLC0415

    first, second = await Store.open(database.url), await Store.open(database.url)
    try:
        rows = await asyncio.gather(
            *[
                s.add_limits(CHART, mean=74.0 + k / 1000, sigma=0.01, source="baseline", detail={})
                for k, s in enumerate([first, second, first, second])
            ]
        )
    finally:
        await first.close()
        await second.close()
    assert sorted(r.version for r in rows) == [1, 2, 3, 4]
