"""Forming subgroups: count groups, clock-aligned time windows, and the validated containers."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from monitor.spc import (
    ConfigError,
    CountSubgrouper,
    Reading,
    ReadingError,
    Subgroup,
    SubgroupBatch,
    WindowSubgrouper,
)

PROPERTY = settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    # shrink to a minimal example, but skip the slow 'explain' annotations
    phases=[phase for phase in Phase if phase is not Phase.explain],
)


def _values(subgroups: list[Subgroup]) -> list[tuple[float, ...]]:
    return [s.values for s in subgroups]


def _open_windows(grouper: WindowSubgrouper) -> list[int]:
    windows = grouper.to_state()["windows"]
    assert isinstance(windows, list)
    return [int(w["window"]) for w in windows]  # type: ignore[index, call-overload]


# ---------------------------------------------------------------- count subgroups


@PROPERTY
@given(
    size=st.integers(1, 6),
    items=st.lists(
        st.tuples(st.floats(-1e6, 1e6), st.floats(0.0, 1e6), st.none() | st.floats(0.1, 50.0)),
        max_size=40,
    ),
)
def test_count_subgroups_hold_consecutive_readings_in_arrival_order(size, items):
    """Every `size` readings make one subgroup, in order; the rest wait; times and units kept."""
    readings = [Reading(v, time=t, exposure=e) for v, t, e in items]
    grouper = CountSubgrouper(size=size)
    made = []
    for i, reading in enumerate(readings):
        subgroup = grouper.add(reading)
        if (i + 1) % size:
            assert subgroup is None
        else:
            assert subgroup is not None
            made.append(subgroup)
    assert grouper.pending == len(readings) % size
    for k, subgroup in enumerate(made):
        chunk = readings[k * size : (k + 1) * size]
        assert subgroup.values == tuple(r.value for r in chunk)
        assert subgroup.start == min(r.time for r in chunk)
        assert subgroup.end == max(r.time for r in chunk)
        if all(r.exposure is None for r in chunk):
            assert subgroup.exposures is None
        else:
            assert subgroup.exposures == tuple(1.0 if r.exposure is None else r.exposure for r in chunk)


@pytest.mark.parametrize("size", [0, -1, 2.0, True, None])
def test_a_count_subgrouper_refuses_a_size_that_is_not_a_positive_integer(size):
    """Sizes must be positive integers: zero, negatives, floats and booleans are refused."""
    with pytest.raises(ConfigError, match="subgroup size"):
        CountSubgrouper(size=size)


# ---------------------------------------------------------------- time windows


def test_windows_are_aligned_to_the_origin_and_include_their_start_only():
    """Window k is [origin + k w, origin + (k + 1) w): a reading at the end opens the next one."""
    grouper = WindowSubgrouper(width=60.0, origin=15.0)
    assert grouper.window_of(15.0) == 0
    assert grouper.window_of(74.999) == 0
    assert grouper.window_of(75.0) == 1
    assert grouper.window_of(14.999) == -1
    assert grouper.window_start(-1) == -45.0
    assert grouper.add(Reading(1.0, time=20.0)) == []
    assert grouper.add(Reading(2.0, time=74.5)) == []
    closed = grouper.add(Reading(3.0, time=75.0))
    assert [(s.values, s.start, s.end) for s in closed] == [((1.0, 2.0), 15.0, 75.0)]


def test_out_of_order_readings_within_the_lateness_land_in_their_own_window_in_time_order():
    """A reading older than the newest one, but within the lateness, joins its window."""
    grouper = WindowSubgrouper(width=60.0, lateness=20.0)
    assert grouper.add(Reading(1.0, time=10.0)) == []
    assert grouper.add(Reading(2.0, time=50.0)) == []
    assert grouper.add(Reading(3.0, time=70.0)) == []  # window 1; window 0 still open
    assert grouper.add(Reading(4.0, time=30.0)) == []  # out of order, window 0
    assert grouper.add(Reading(5.0, time=65.0)) == []  # out of order, window 1
    closed = grouper.add(Reading(6.0, time=81.0))  # 81 - 20 passes the end of window 0
    assert [(s.values, s.start, s.end) for s in closed] == [((1.0, 4.0, 2.0), 0.0, 60.0)]
    assert grouper.stats.late == 0
    (last,) = grouper.flush()
    assert last.values == (5.0, 3.0, 6.0)


def test_late_readings_are_counted_and_dropped():
    """A reading for a window that has closed is counted late and never charted."""
    grouper = WindowSubgrouper(width=60.0, lateness=5.0)
    grouper.add(Reading(1.0, time=10.0))
    closed = grouper.add(Reading(2.0, time=66.0))
    assert _values(closed) == [(1.0,)]
    assert grouper.add(Reading(9.0, time=59.0)) == []
    assert grouper.add(Reading(9.5, time=0.0)) == []
    assert grouper.stats.late == 2
    assert grouper.pending == 1
    assert _values(grouper.flush()) == [(2.0,)]


def test_short_windows_are_counted_and_dropped():
    """A window closing with fewer than min_size readings makes no subgroup; it is counted."""
    grouper = WindowSubgrouper(width=10.0, min_size=3)
    for t in (1.0, 2.0, 11.0, 12.0, 13.0):
        grouper.add(Reading(t, time=t))
    closed = grouper.add(Reading(25.0, time=25.0))
    assert _values(closed) == [(11.0, 12.0, 13.0)]
    assert grouper.stats.short_windows == 1
    assert grouper.stats.short_readings == 2
    assert grouper.flush() == []
    assert grouper.stats.short_windows == 2
    assert grouper.stats.short_readings == 3


def test_advance_closes_windows_once_their_end_plus_lateness_has_come():
    """advance(now) closes a window when now reaches its end plus the lateness, not before."""
    grouper = WindowSubgrouper(width=60.0, lateness=5.0)
    grouper.add(Reading(1.0, time=10.0))
    grouper.add(Reading(2.0, time=20.0))
    assert grouper.advance(64.999) == []
    assert grouper.pending == 2
    closed = grouper.advance(65.0)
    assert [(s.values, s.start, s.end) for s in closed] == [((1.0, 2.0), 0.0, 60.0)]
    assert grouper.pending == 0
    assert grouper.add(Reading(3.0, time=30.0)) == []
    assert grouper.stats.late == 1


def test_advance_closes_every_window_due_oldest_first():
    """One advance far ahead closes all due windows, oldest first, and leaves the rest open."""
    grouper = WindowSubgrouper(width=10.0, lateness=100.0)
    for t in (35.0, 5.0, 15.0, 47.0, 36.0):
        assert grouper.add(Reading(t, time=t)) == []
    closed = grouper.advance(140.0)  # 140 - 100 = 40: windows ending at or before 40 close
    assert [(s.values, s.start) for s in closed] == [
        ((5.0,), 0.0),
        ((15.0,), 10.0),
        ((35.0, 36.0), 30.0),
    ]
    assert grouper.stats.late == 0
    assert _open_windows(grouper) == [4]


def test_flush_closes_every_open_window_in_order():
    """flush closes all open windows, oldest first, whatever the time."""
    grouper = WindowSubgrouper(width=10.0, lateness=100.0)
    for t in (25.0, 3.0, 14.0, 27.0):
        grouper.add(Reading(t, time=t))
    assert grouper.pending == 4
    closed = grouper.flush()
    assert [(s.values, s.start) for s in closed] == [
        ((3.0,), 0.0),
        ((14.0,), 10.0),
        ((25.0, 27.0), 20.0),
    ]
    assert grouper.pending == 0
    assert grouper.flush() == []


def test_max_open_bounds_the_open_windows_by_closing_the_oldest():
    """With max_open windows open, a new window closes the oldest; its readings then are overflow."""
    grouper = WindowSubgrouper(width=10.0, lateness=1000.0, max_open=2)
    assert grouper.add(Reading(1.0, time=1.0)) == []
    assert grouper.add(Reading(2.0, time=11.0)) == []
    closed = grouper.add(Reading(3.0, time=21.0))
    assert [(s.values, s.start) for s in closed] == [((1.0,), 0.0)]
    assert _open_windows(grouper) == [1, 2]
    assert grouper.add(Reading(4.0, time=2.0)) == []
    assert (grouper.stats.late, grouper.stats.overflow) == (0, 1)


@pytest.mark.parametrize(
    "options",
    [
        {"width": 0.0},
        {"width": -1.0},
        {"width": math.inf},
        {"width": 10.0, "min_size": 0},
        {"width": 10.0, "lateness": -1.0},
        {"width": 10.0, "lateness": math.nan},
        {"width": 10.0, "origin": math.inf},
        {"width": 10.0, "max_open": 0},
    ],
)
def test_a_window_subgrouper_refuses_impossible_settings(options):
    """Non-positive widths, negative lateness, infinite origins and the like are refused."""
    with pytest.raises(ConfigError):
        WindowSubgrouper(**options)


_STEPS = st.lists(
    st.tuples(
        st.sampled_from(["add", "add", "add", "advance"]),
        st.floats(0.0, 25.0),  # how far the clock moves first
        st.floats(-80.0, 0.0),  # how far behind the clock an event time is (out of order)
    ),
    max_size=60,
)
"""Steps on a line clock: readings arrive with event times up to 80 s behind the clock."""


@PROPERTY
@given(
    width=st.sampled_from([1.0, 10.0, 37.5, 60.0]),
    min_size=st.integers(1, 4),
    lateness=st.sampled_from([0.0, 3.0, 30.0, 500.0]),
    origin=st.sampled_from([0.0, 7.25, -30.0]),
    max_open=st.integers(1, 5),
    steps=_STEPS,
    flush=st.booleans(),
)
def test_every_reading_given_to_a_window_subgrouper_is_accounted_for_exactly_once(
    width, min_size, lateness, origin, max_open, steps, flush
):
    """Conservation: each reading is charted once, counted late, overflow or short, or pending."""
    grouper = WindowSubgrouper(
        width=width, min_size=min_size, lateness=lateness, origin=origin, max_open=max_open
    )
    times: list[float] = []
    charted: list[int] = []
    last_start = -math.inf

    def take(closed: list[Subgroup]) -> None:
        nonlocal last_start
        for subgroup in closed:
            ids = [int(v) for v in subgroup.values]
            assert len(ids) >= min_size
            assert subgroup.start is not None
            assert subgroup.end is not None
            assert subgroup.start > last_start  # windows close in order, each once
            last_start = subgroup.start
            assert subgroup.end == grouper.window_start(grouper.window_of(subgroup.start) + 1)
            for i in ids:
                assert subgroup.start == grouper.window_start(grouper.window_of(times[i]))
            assert [times[i] for i in ids] == sorted(times[i] for i in ids)
            charted.extend(ids)

    clock = 0.0
    for action, move, behind in steps:
        clock += move
        time = clock + behind
        if action == "add":
            times.append(time)
            take(grouper.add(Reading(float(len(times) - 1), time=time)))
            assert len(_open_windows(grouper)) <= max_open
        else:
            take(grouper.advance(clock))
        pending = [
            int(r["value"])  # type: ignore[index, call-overload]
            for w in grouper.to_state()["windows"]  # type: ignore[union-attr]
            for r in w["readings"]  # type: ignore[index, union-attr]
        ]
        assert len(set(charted)) == len(charted)
        assert not set(charted) & set(pending)
        assert set(charted) | set(pending) <= set(range(len(times)))
        stats = grouper.stats
        dropped = stats.late + stats.overflow + stats.short_readings
        assert len(charted) + dropped + len(pending) == len(times)
        assert grouper.pending == len(pending)
    if flush:
        take(grouper.flush())
        assert grouper.pending == 0
        stats = grouper.stats
        assert len(charted) + stats.late + stats.overflow + stats.short_readings == len(times)


# ---------------------------------------------------------------- what is refused


@pytest.mark.parametrize(
    "make",
    [
        lambda: Reading(math.nan, time=0.0),
        lambda: Reading(math.inf, time=0.0),
        lambda: Reading(-math.inf, time=0.0),
        lambda: Reading(1.0, time=math.nan),
        lambda: Reading(1.0, time=math.inf),
        lambda: Reading(1.0, time=0.0, exposure=0.0),
        lambda: Reading(1.0, time=0.0, exposure=-2.0),
        lambda: Reading(1.0, time=0.0, exposure=math.nan),
        lambda: Reading(1.0, time=0.0, exposure=math.inf),
    ],
    ids=[
        "nan-value",
        "inf-value",
        "minus-inf-value",
        "nan-time",
        "inf-time",
        "zero-exposure",
        "negative-exposure",
        "nan-exposure",
        "inf-exposure",
    ],
)
def test_a_reading_that_is_not_finite_or_has_no_positive_exposure_is_refused(make):
    """Readings must have a finite value and time, and a positive finite exposure if any."""
    with pytest.raises(ReadingError):
        make()


@pytest.mark.parametrize(
    "make",
    [
        lambda: Subgroup(()),
        lambda: Subgroup((1.0, math.nan)),
        lambda: Subgroup((math.inf,)),
        lambda: Subgroup((1.0, 2.0), exposures=(1.0,)),
        lambda: Subgroup((1.0,), exposures=(1.0, 2.0)),
        lambda: Subgroup((1.0,), exposures=(0.0,)),
        lambda: Subgroup((1.0,), exposures=(math.nan,)),
        lambda: Subgroup.of([]),
    ],
    ids=[
        "empty",
        "nan",
        "inf",
        "fewer-exposures",
        "more-exposures",
        "zero-exposure",
        "nan-exposure",
        "of-nothing",
    ],
)
def test_a_subgroup_that_is_empty_not_finite_or_with_mismatched_exposures_is_refused(make):
    """Subgroups need readings, finite values, and one positive exposure per reading if any."""
    with pytest.raises(ReadingError):
        make()


@pytest.mark.parametrize(
    "make",
    [
        lambda: SubgroupBatch(np.array([[1.0, np.nan]]), np.array([2])),
        lambda: SubgroupBatch(np.array([[1.0, np.inf]]), np.array([2])),
        lambda: SubgroupBatch(np.array([[1.0, 0.0]]), np.array([2]) * 0 + 9),
        lambda: SubgroupBatch(np.array([[1.0, 0.0]]), np.array([0])),
        lambda: SubgroupBatch(np.array([[1.0, 0.0]]), np.array([1, 1])),
        lambda: SubgroupBatch(np.array([1.0, 2.0]), np.array([1, 1])),
        lambda: SubgroupBatch(np.array([[1.0, 2.0]]), np.array([2]), exposures=np.array([[1.0, 1.0, 1.0]])),
        lambda: SubgroupBatch(np.array([[1.0, 2.0]]), np.array([2]), exposures=np.array([[1.0, 0.0]])),
        lambda: SubgroupBatch.from_ragged([1.0, 2.0, 3.0], [2, 2]),
        lambda: SubgroupBatch.from_ragged([1.0, 2.0], [2, 0]),
        lambda: SubgroupBatch.from_ragged([1.0, np.nan], [1, 1]),
        lambda: SubgroupBatch.from_rows([[1.0, np.inf]]),
    ],
    ids=[
        "nan",
        "inf",
        "size-above-width",
        "size-zero",
        "sizes-per-row",
        "one-dimensional",
        "exposure-shape",
        "zero-exposure",
        "ragged-sizes-sum",
        "ragged-empty-subgroup",
        "ragged-nan",
        "rows-inf",
    ],
)
def test_a_batch_that_is_not_finite_empty_or_misshapen_is_refused(make):
    """Batches refuse non-finite values, empty or oversize subgroups and misshapen exposures."""
    with pytest.raises(ReadingError):
        make()


@pytest.mark.parametrize(
    ("flat", "sizes", "exposures"),
    [
        ([1.0, 2.0, 3.0], [2, 1], [1.0, 2.0]),
        ([1.0, 2.0, 3.0, 4.0], [2, 2], [1.0, 2.0, 3.0]),
        ([1.0, 2.0], [1, 1], [1.0, 2.0, 3.0]),
    ],
    ids=["ragged-too-few", "uniform-too-few", "too-many"],
)
def test_a_ragged_batch_with_one_exposure_too_many_or_too_few_is_refused_as_a_reading_error(
    flat, sizes, exposures
):
    """from_ragged with exposures not matching the readings raises ReadingError like the rest."""
    with pytest.raises(ReadingError):
        SubgroupBatch.from_ragged(flat, sizes, exposures=exposures)


# ---------------------------------------------------------------- round trips

_SIZES = st.lists(st.integers(1, 6), max_size=12)


@PROPERTY
@given(data=st.data(), sizes=_SIZES)
def test_from_ragged_then_subgroup_gives_back_each_run_of_readings(data, sizes):
    """Subgroup i of a ragged batch holds readings sum(sizes[:i]) to sum(sizes[:i+1]) - 1."""
    flat = data.draw(st.lists(st.floats(-1e6, 1e6), min_size=sum(sizes), max_size=sum(sizes)), label="flat")
    units = data.draw(
        st.none() | st.lists(st.floats(0.1, 100.0), min_size=sum(sizes), max_size=sum(sizes)),
        label="exposures",
    )
    batch = SubgroupBatch.from_ragged(flat, sizes, exposures=units)
    assert len(batch) == len(sizes)
    assert batch.sizes.tolist() == sizes
    offset = 0
    for i, n in enumerate(sizes):
        subgroup = batch.subgroup(i)
        assert subgroup.values == tuple(flat[offset : offset + n])
        assert subgroup.exposures == (None if units is None else tuple(units[offset : offset + n]))
        offset += n
    assert batch.uniform == (len(set(sizes)) <= 1)


_SUBGROUP = st.builds(
    lambda values, times, units: Subgroup(
        tuple(values),
        start=None if times is None else min(times),
        end=None if times is None else max(times),
        exposures=None if units is None else tuple(units[: len(values)]),
    ),
    st.lists(st.floats(-1e6, 1e6), min_size=1, max_size=6),
    st.none() | st.lists(st.floats(0.0, 1e9), min_size=2, max_size=2),
    st.none() | st.lists(st.floats(0.1, 100.0), min_size=6, max_size=6),
)


@PROPERTY
@given(subgroups=st.lists(_SUBGROUP, max_size=12), with_units=st.booleans())
def test_from_subgroups_then_subgroup_gives_back_the_same_subgroups(subgroups, with_units):
    """A batch of subgroups (all with exposures or none) gives each subgroup back unchanged."""
    subgroups = [
        Subgroup(
            s.values,
            s.start,
            s.end,
            exposures=(s.exposures or (1.0,) * s.n) if with_units else None,
        )
        for s in subgroups
    ]
    batch = SubgroupBatch.from_subgroups(subgroups)
    assert len(batch) == len(subgroups)
    assert [batch.subgroup(i) for i in range(len(batch))] == subgroups


def test_a_subgroup_without_exposures_in_a_batch_with_exposures_counts_one_unit_per_reading():
    """Mixing subgroups with and without exposures fills one unit per reading for the latter."""
    batch = SubgroupBatch.from_subgroups(
        [Subgroup((1.0, 0.0), exposures=(5.0, 7.0)), Subgroup((1.0, 1.0, 0.0))]
    )
    assert batch.subgroup(1).exposures == (1.0, 1.0, 1.0)
    assert batch.subgroup(0).exposures == (5.0, 7.0)


@PROPERTY
@given(
    rows=st.integers(0, 10).flatmap(
        lambda m: st.integers(1, 5).flatmap(
            lambda n: st.lists(st.lists(st.floats(-1e6, 1e6), min_size=n, max_size=n), min_size=m, max_size=m)
        )
    )
)
def test_from_rows_gives_one_uniform_subgroup_per_row(rows):
    """Each row of equal length becomes one subgroup of that size; a flat list, single readings."""
    if rows:
        batch = SubgroupBatch.from_rows(rows)
        assert batch.uniform
        assert [batch.subgroup(i).values for i in range(len(batch))] == [tuple(r) for r in rows]
        column = [r[0] for r in rows]
        singles = SubgroupBatch.from_rows(column)
        assert singles.sizes.tolist() == [1] * len(rows)
        assert [singles.subgroup(i).values for i in range(len(rows))] == [(v,) for v in column]
    else:
        assert len(SubgroupBatch.from_rows(np.empty((0, 3)))) == 0


@PROPERTY
@given(
    subgroups=st.lists(_SUBGROUP, min_size=1, max_size=12),
    begin=st.integers(0, 12),
    stop=st.integers(0, 12),
)
def test_a_slice_of_a_batch_holds_the_same_subgroups_as_the_batch(subgroups, begin, stop):
    """slice(begin, stop) gives subgroups begin .. stop - 1 of the batch, times and units too."""
    subgroups = [Subgroup(s.values, s.start, s.end, exposures=None) for s in subgroups]
    batch = SubgroupBatch.from_subgroups(subgroups)
    begin, stop = min(begin, len(batch)), min(max(begin, stop), len(batch))
    part = batch.slice(begin, stop)
    assert len(part) == stop - begin
    assert [part.subgroup(j) for j in range(len(part))] == subgroups[begin:stop]


@settings(max_examples=200, deadline=None)
@given(
    size=st.integers(min_value=1, max_value=6),
    chunks=st.lists(st.integers(min_value=0, max_value=13), min_size=1, max_size=8),
    weighted=st.booleans(),
    data=st.data(),
)
def test_readings_added_as_arrays_form_the_subgroups_added_one_by_one(size, chunks, weighted, data):
    """add_many reshapes what add would group (the streaming former is the reference), with or
    without exposures, carrying the partial subgroup across calls and across a checkpoint."""
    one, many = CountSubgrouper(size=size), CountSubgrouper(size=size)
    clock = 1_767_600_000.0
    for count in chunks:
        values = data.draw(st.lists(st.floats(-1e6, 1e6), min_size=count, max_size=count))
        times = [clock + data.draw(st.floats(0, 100)) for _ in range(count)]
        weights = [data.draw(st.floats(0.5, 50)) if weighted else None for _ in range(count)]
        readings = [Reading(v, t, w) for v, t, w in zip(values, times, weights, strict=True)]
        expected = [s for r in readings if (s := one.add(r)) is not None]
        batch = many.add_many(
            np.array(values, dtype=float),
            np.array(times, dtype=float),
            np.array(weights) if weighted else None,
        )
        assert [batch.subgroup(i) for i in range(len(batch))] == expected
        assert many.to_state() == one.to_state()
        many = CountSubgrouper.from_state(many.to_state())
