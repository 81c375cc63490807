"""Committing batches: one transaction each, idempotent, exact times, faithful JSON."""

from __future__ import annotations

import asyncio
import math
import sqlite3
from dataclasses import replace

import numpy as np
import pytest

from monitor.store import CommitBatch, LimitsRow, Panel, Store, StoreError, SubgroupBlock, SubgroupRow, schema
from monitor.store.store import WAL_CHECKPOINT_EVERY
from tests.store.samples import T0, alert, full_batch, limits, signal, subgroup


async def test_a_commit_stores_every_kind_of_row(store):
    """After one commit, subgroups, signals, alerts, limits and checkpoints read back as written."""
    batch = full_batch("press-1/bore")
    await store.commit(batch)
    assert await store.subgroups_for("press-1/bore") == batch.subgroups
    assert await store.signals_for("press-1/bore") == batch.signals
    assert [a.id for a in await store.pending_alerts()] == ["press-1/bore-a2"]
    assert await store.latest_limits("press-1/bore") == batch.limits[0]
    assert await store.load_checkpoints() == batch.checkpoints
    assert await store.alert_chart("press-1/bore-a2") == "press-1/bore"


async def test_a_failing_row_leaves_nothing_of_its_batch(store, database):
    """A signal violating NOT NULL aborts the batch: none of its rows, charts or checkpoints appear."""
    await store.commit(full_batch("press-1/bore"))
    good = full_batch("glaze-1/weight")
    broken = replace(signal("glaze-1/weight", 2), value=None)
    batch = CommitBatch(
        subgroups=good.subgroups,
        signals=[*good.signals, broken],
        alerts=good.alerts,
        limits=good.limits,
        checkpoints={**good.checkpoints, "press-1/bore": {"overwritten": True}},
    )
    with pytest.raises(StoreError, match="commit failed"):
        await store.commit(batch)
    assert await store.subgroup_count("glaze-1/weight") == 0
    assert await store.signals_for("glaze-1/weight") == []
    assert await store.latest_limits("glaze-1/weight") is None
    assert [a.chart for a in await store.pending_alerts()] == ["press-1/bore"]
    assert await store.load_checkpoints() == full_batch("press-1/bore").checkpoints
    assert [row["chart"] for row in database.rows(schema.charts)] == ["press-1/bore"]


async def test_committing_the_same_batch_twice_stores_each_row_once(store, database):
    """Re-committing a batch (as after a crash before the acknowledgement) duplicates nothing."""
    batch = full_batch("press-1/bore")
    await store.commit(batch)
    await store.commit(batch)
    counts = {
        table.name: database.count(table)
        for table in (schema.charts, schema.subgroups, schema.signals, schema.alerts, schema.limits)
    }
    assert counts == {"charts": 1, "subgroups": 2, "signals": 1, "alerts": 1, "limits": 1}
    assert len(database.rows(schema.checkpoints)) == 1


async def test_a_recommitted_row_keeps_its_first_content(store):
    """A subgroup committed again under the same chart and index is not overwritten."""
    first = subgroup("press-1/bore", 1)
    await store.commit(CommitBatch(subgroups=[first]))
    await store.commit(CommitBatch(subgroups=[replace(first, n=4)]))
    assert await store.subgroups_for("press-1/bore") == [first]


async def test_checkpoints_keep_the_latest_state_of_each_chart(store):
    """A checkpoint upsert replaces the chart's state and leaves other charts' states alone."""
    await store.commit(CommitBatch(checkpoints={"a": {"step": 1}, "b": {"step": 1}}))
    await store.commit(CommitBatch(checkpoints={"a": {"step": 2, "ewma": 8.01}}))
    assert await store.load_checkpoints() == {"a": {"step": 2, "ewma": 8.01}, "b": {"step": 1}}


async def test_times_survive_as_exact_epoch_milliseconds(store, database):
    """Epoch milliseconds come back unchanged, including values a double cannot hold and None."""
    beyond_double = 2**53 + 1
    rows = [
        SubgroupRow("clock", 1, T0 + 123, T0 + 59_999, 3, {}),
        SubgroupRow("clock", 2, None, None, 3, {}),
        SubgroupRow("clock", 3, beyond_double, 2**62 + 7, 3, {}),
    ]
    mark = LimitsRow("clock", 1, 0.0, None, "baseline", {}, beyond_double)
    await store.commit(
        CommitBatch(subgroups=rows, limits=[mark], alerts=[alert("clock", "c1", created_ms=T0 + 1)])
    )
    assert await store.subgroups_for("clock") == rows
    assert await store.latest_limits("clock") == mark
    assert [r["created_ms"] for r in database.rows(schema.alerts)] == [T0 + 1]


async def test_json_round_trips_nested_dicts_none_and_floats_exactly(store):
    """Nested dicts, lists, None, unicode and awkward floats come back bit for bit."""
    floats = [0.1 + 0.2, 1 / 3, 5e-324, 1.7976931348623157e308, -0.0, 8.000000000000002]
    points: dict[str, object] = {
        "ewma": {"mean": {"value": floats[0], "center": 8.0, "lower": None, "upper": None}},
        "cusum": {"upper": {"value": 0.0, "trace": [1, 2.5, None, {"deep": {"deeper": "Ω µm"}}]}},
        "floats": floats,
    }
    state: dict[str, object] = {"kind": "chart_set", "schema": 1, "charts": [{"floats": floats}]}
    detail: dict[str, object] = {"sigma_from": "pooled", "excluded": [3, 17], "estimate": floats[1]}
    await store.commit(
        CommitBatch(
            subgroups=[SubgroupRow("json", 1, T0, T0, 5, points)],
            limits=[LimitsRow("json", 1, floats[5], floats[1], "baseline", detail, T0)],
            checkpoints={"json": state},
        )
    )
    (stored,) = await store.subgroups_for("json")
    assert stored.points == points
    stored_floats = stored.points["floats"]
    assert isinstance(stored_floats, list)
    assert [x.hex() for x in stored_floats] == [x.hex() for x in floats]
    assert math.copysign(1.0, stored_floats[4]) == -1.0
    assert (await store.load_checkpoints())["json"] == state
    stored_limits = await store.latest_limits("json")
    assert stored_limits is not None
    assert stored_limits.detail == detail
    assert (stored_limits.mean.hex(), stored_limits.sigma) == (floats[5].hex(), floats[1])


async def test_ten_thousand_subgroups_commit_in_one_batch(store):
    """A batch of 10,000 subgroups commits and every one is stored."""
    await store.commit(CommitBatch(subgroups=[subgroup("bulk", i) for i in range(10_000)]))
    assert await store.subgroup_count("bulk") == 10_000
    tail = await store.subgroups_for("bulk", since_index=9_998)
    assert tail == [subgroup("bulk", 9_998), subgroup("bulk", 9_999)]


async def test_subgroups_come_back_in_index_order_from_an_index_on(store):
    """subgroups_for reads one chart's subgroups from since_index, ordered, at most limit."""
    await store.commit(CommitBatch(subgroups=[subgroup("a", i) for i in (5, 1, 4, 2, 3)]))
    await store.commit(CommitBatch(subgroups=[subgroup("b", 3)]))
    assert [s.index for s in await store.subgroups_for("a")] == [1, 2, 3, 4, 5]
    assert [s.index for s in await store.subgroups_for("a", since_index=3)] == [3, 4, 5]
    assert [s.index for s in await store.subgroups_for("a", since_index=2, limit=2)] == [2, 3]
    assert await store.subgroup_count("a") == 5
    assert await store.subgroup_count("nobody") == 0


async def test_signals_come_back_ordered_by_subgroup(store):
    """signals_for returns one chart's signals sorted by subgroup, whatever the commit order."""
    await store.commit(CommitBatch(signals=[signal("a", 7), signal("a", 2), signal("b", 1)]))
    await store.commit(CommitBatch(signals=[signal("a", 4), signal("a", 2, rule="same_side_run")]))
    found = [(s.subgroup, s.rule) for s in await store.signals_for("a")]
    assert found == [(2, "beyond_limits"), (2, "same_side_run"), (4, "beyond_limits"), (7, "beyond_limits")]


async def test_latest_limits_are_those_of_the_highest_version(store):
    """latest_limits picks the highest version, not the newest or last committed; None for a new chart."""
    highest = limits("a", 3, mean=3.0, created_ms=T0 + 3)
    await store.commit(CommitBatch(limits=[limits("a", 1, mean=1.0, created_ms=T0 + 1), highest]))
    await store.commit(CommitBatch(limits=[limits("a", 2, mean=2.0, created_ms=T0 + 9)]))
    assert await store.latest_limits("a") == highest
    assert await store.latest_limits("b") is None


async def test_chart_positions_give_the_next_subgroup_and_the_latest_limits_version(store):
    """After stored history a chart continues at max(index) + 1 and its newest limits version."""
    assert await store.chart_positions() == {}
    await store.commit(
        CommitBatch(
            subgroups=[subgroup("a", 0), subgroup("a", 1), subgroup("a", 7), subgroup("b", 3)],
            limits=[limits("a", 1), limits("a", 2), limits("c", 4)],
        )
    )
    assert await store.chart_positions() == {"a": (8, 2), "b": (4, 0), "c": (0, 4)}


async def test_sqlite_keeps_its_write_ahead_log_bounded_and_folds_it_in_at_close(tmp_path):
    """Commits run on the caller's thread with passive checkpoints on the store's: over 25 MB of
    commits the log stays near SQLite's 1000-page checkpoint size, and closing empties it."""
    path = tmp_path / "monitor.db"
    wal = tmp_path / "monitor.db-wal"
    store = await Store.open(f"sqlite:///{path}")
    assert store.inline
    state = {"readings": list(range(1500))}  # about 8 KB per checkpoint row
    largest = 0
    try:
        for k in range(30 * WAL_CHECKPOINT_EVERY):
            await store.commit(CommitBatch(subgroups=[subgroup("a", k)], checkpoints={"a": state}))
            await asyncio.sleep(0)  # the passive checkpoints run on the store's thread
            largest = max(largest, wal.stat().st_size)
    finally:
        await store.close()
    assert largest < 12 * 2**20  # 1000 pages of 4 KiB, a checkpoint's worth of slack
    assert not wal.exists() or wal.stat().st_size == 0
    with sqlite3.connect(path) as db:
        assert db.execute("select count(*) from subgroups").fetchone() == (30 * WAL_CHECKPOINT_EVERY,)


def _block(chart: str, first: int, *, missing_first: bool = False) -> SubgroupBlock:
    rng = np.random.default_rng(first)
    count = 6
    values = np.round(rng.normal(8.0, 0.04, size=(count, 4)), 4)
    starts = T0 / 1000.0 + np.arange(count) * 2.0005
    tail = np.full(count, np.nan)  # a limit the panel does not have
    mean = Panel(
        "xbar_s", "mean", values.mean(axis=1), np.full(count, 8.0), np.full(count, 7.94), np.full(count, 8.06)
    )
    spread = values.std(axis=1, ddof=1)
    if missing_first:
        spread[0] = np.nan
    sd = Panel("xbar_s", "sd", spread, np.full(count, 0.037), tail, np.full(count, 0.083))
    cusum = Panel(
        "cusum", "cusum_upper", rng.random(count) * 1e-7, np.zeros(count), tail, np.full(count, 5.0)
    )
    return SubgroupBlock(chart, first, starts, starts + 1.5, values, (mean, sd, cusum))


@pytest.mark.parametrize("missing_first", [False, True])
async def test_a_block_of_subgroups_reads_back_as_its_rows(store, missing_first):
    """Subgroups written as arrays are the rows the block stands for, JSON and times exact
    (the row-by-row writing is the reference; a NaN value is a panel without that point)."""
    block = _block("press-1/bore", 3, missing_first=missing_first)
    await store.commit(
        CommitBatch(subgroups=[subgroup("press-1/bore", 0)], blocks=[block, _block("press-1/bore", 9)])
    )
    expected = [subgroup("press-1/bore", 0), *block.rows(), *_block("press-1/bore", 9).rows()]
    got = await store.subgroups_for("press-1/bore")
    assert [r.index for r in got] == [0, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14]
    assert got == expected
    await store.commit(CommitBatch(blocks=[block]))  # again, as after a crash before the acknowledgement
    assert await store.subgroups_for("press-1/bore") == expected
    assert ("sd" in got[1].points["xbar_s"]) is not missing_first
    assert got[1].points["cusum"]["cusum_upper"]["lower"] is None
