"""Readings, subgroups, and the pure objects that form subgroups from readings.

A *reading* is one measured value with its event time. A *subgroup* is the set of
readings one chart point summarises: ``n`` consecutive readings (:class:`CountSubgrouper`)
or all readings of one clock-aligned time window (:class:`WindowSubgrouper`).
Time is always passed in (seconds since the epoch, UTC); nothing here reads a clock.

Examples:
    >>> grouper = CountSubgrouper(size=3)
    >>> [grouper.add(Reading(value=v, time=t)) for t, v in [(0.0, 1.0), (1.0, 2.0), (2.0, 4.0)]]
    [None, None, Subgroup(values=(1.0, 2.0, 4.0), start=0.0, end=2.0, exposures=None)]
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Self

import numpy as np
from numpy.typing import NDArray

from monitor.spc._state import (
    check_header,
    get_float,
    get_int,
    get_optional_float,
    get_state_list,
    header,
)
from monitor.spc.errors import ConfigError, ReadingError
from monitor.spc.types import State

__all__ = [
    "CountSubgrouper",
    "Reading",
    "Subgroup",
    "SubgroupBatch",
    "WindowStats",
    "WindowSubgrouper",
]


@dataclass(frozen=True, slots=True)
class Reading:
    """One measured value at one event time.

    Args:
        value: the measurement (for attribute charts: a count of rejects or defects).
        time: event time in seconds since the epoch (UTC).
        exposure: for attribute charts, the units inspected for this count; None means 1.
    """

    value: float
    time: float
    exposure: float | None = None

    def __post_init__(self) -> None:
        if not math.isfinite(self.value):
            raise ReadingError(f"reading value must be finite, got {self.value!r}")
        if not math.isfinite(self.time):
            raise ReadingError(f"reading time must be finite, got {self.time!r}")
        if self.exposure is not None and not (math.isfinite(self.exposure) and self.exposure > 0):
            raise ReadingError(f"reading exposure must be positive, got {self.exposure!r}")


@dataclass(frozen=True, slots=True)
class Subgroup:
    """The readings summarised by one chart point.

    Args:
        values: the readings' values (at least one, all finite).
        start: event time of the first reading or the window start, if known.
        end: event time of the last reading or the window end, if known.
        exposures: units inspected per reading (attribute charts); None means one each.

    Examples:
        >>> Subgroup((74.03, 74.002)).n
        2
        >>> Subgroup(())
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ReadingError: a subgroup needs at least one reading
    """

    values: tuple[float, ...]
    start: float | None = None
    end: float | None = None
    exposures: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        if not self.values:
            raise ReadingError("a subgroup needs at least one reading")
        for value in self.values:
            if not math.isfinite(value):
                raise ReadingError(f"subgroup values must be finite, got {value!r}")
        if self.exposures is not None:
            if len(self.exposures) != len(self.values):
                raise ReadingError(
                    f"subgroup has {len(self.values)} values but {len(self.exposures)} exposures"
                )
            for exposure in self.exposures:
                if not (math.isfinite(exposure) and exposure > 0):
                    raise ReadingError(f"exposures must be positive, got {exposure!r}")

    @property
    def n(self) -> int:
        """Number of readings."""
        return len(self.values)

    @classmethod
    def of(cls, readings: Sequence[Reading]) -> Self:
        """The subgroup of these readings, in the order given."""
        if not readings:
            raise ReadingError("a subgroup needs at least one reading")
        exposures: tuple[float, ...] | None = None
        if any(r.exposure is not None for r in readings):
            exposures = tuple(1.0 if r.exposure is None else r.exposure for r in readings)
        times = [r.time for r in readings]
        return cls(
            values=tuple(r.value for r in readings),
            start=min(times),
            end=max(times),
            exposures=exposures,
        )


@dataclass(frozen=True, eq=False)
class SubgroupBatch:
    """Many subgroups as arrays, for the vectorised chart paths.

    ``values`` has one row per subgroup, padded with zeros to the largest size;
    ``sizes`` says how many entries of each row are readings.

    Examples:
        >>> batch = SubgroupBatch.from_ragged([1.0, 2.0, 3.0, 10.0], sizes=[3, 1])
        >>> batch.values.tolist(), batch.sizes.tolist()
        ([[1.0, 2.0, 3.0], [10.0, 0.0, 0.0]], [3, 1])
    """

    values: NDArray[np.float64]
    sizes: NDArray[np.int64]
    start: NDArray[np.float64] | None = None
    end: NDArray[np.float64] | None = None
    exposures: NDArray[np.float64] | None = None
    _cache: dict[str, NDArray[np.float64]] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        if self.values.ndim != 2:
            raise ReadingError(f"batch values must be 2-D (subgroups x readings), got {self.values.ndim}-D")
        rows, width = self.values.shape
        if self.sizes.shape != (rows,):
            raise ReadingError(f"batch has {rows} rows but {self.sizes.shape[0]} sizes")
        if rows and (int(self.sizes.min()) < 1 or int(self.sizes.max()) > width):
            raise ReadingError(f"batch sizes must be between 1 and {width}")
        if not np.isfinite(self.values).all():
            raise ReadingError("batch values must be finite")
        if self.exposures is not None:
            if self.exposures.shape != self.values.shape:
                raise ReadingError("batch exposures must have the shape of its values")
            inside = np.arange(width) < self.sizes[:, None]
            if not (np.isfinite(self.exposures).all() and (self.exposures[inside] > 0).all()):
                raise ReadingError("batch exposures must be positive")

    @classmethod
    def from_rows(
        cls,
        rows: NDArray[np.float64] | Sequence[Sequence[float]],
        *,
        start: NDArray[np.float64] | None = None,
        end: NDArray[np.float64] | None = None,
    ) -> SubgroupBatch:
        """Subgroups of equal size, one per row (a 1-D array is one reading per subgroup)."""
        values = np.asarray(rows, dtype=np.float64)
        if values.ndim == 1:
            values = values[:, None]
        values = np.ascontiguousarray(values)
        sizes = np.full(values.shape[0], values.shape[1], dtype=np.int64)
        return cls(values=values, sizes=sizes, start=start, end=end)

    @classmethod
    def from_ragged(
        cls,
        flat: NDArray[np.float64] | Sequence[float],
        sizes: NDArray[np.int64] | Sequence[int],
        *,
        exposures: NDArray[np.float64] | Sequence[float] | None = None,
        start: NDArray[np.float64] | None = None,
        end: NDArray[np.float64] | None = None,
    ) -> SubgroupBatch:
        """Subgroups of varying size from consecutive readings and the size of each subgroup."""
        flat_values = np.asarray(flat, dtype=np.float64)
        size_array = np.asarray(sizes, dtype=np.int64)
        if int(size_array.sum()) != flat_values.shape[0]:
            raise ReadingError(
                f"sizes add up to {int(size_array.sum())} but {flat_values.shape[0]} readings were given"
            )
        width = int(size_array.max()) if size_array.size else 1
        values = _pad(flat_values, size_array, width)
        padded_exposures = None
        if exposures is not None and len(exposures) != flat_values.shape[0]:
            raise ReadingError(f"{flat_values.shape[0]} readings were given but {len(exposures)} exposures")
        if exposures is not None:
            padded_exposures = _pad(np.asarray(exposures, dtype=np.float64), size_array, width, fill=1.0)
        return cls(values=values, sizes=size_array, start=start, end=end, exposures=padded_exposures)

    @classmethod
    def from_subgroups(cls, subgroups: Sequence[Subgroup]) -> SubgroupBatch:
        """The batch holding these subgroups in order."""
        sizes = np.array([s.n for s in subgroups], dtype=np.int64)
        flat = np.array([v for s in subgroups for v in s.values], dtype=np.float64)
        exposures = None
        if any(s.exposures is not None for s in subgroups):
            exposures = np.array(
                [e for s in subgroups for e in (s.exposures or (1.0,) * s.n)], dtype=np.float64
            )
        start = np.array([math.nan if s.start is None else s.start for s in subgroups])
        end = np.array([math.nan if s.end is None else s.end for s in subgroups])
        return cls.from_ragged(flat, sizes, exposures=exposures, start=start, end=end)

    def __len__(self) -> int:
        """Number of subgroups."""
        return int(self.sizes.shape[0])

    @property
    def uniform(self) -> bool:
        """Whether every subgroup fills its row (no padding)."""
        return bool((self.sizes == self.values.shape[1]).all())

    def subgroup(self, i: int) -> Subgroup:
        """Subgroup ``i`` as an object (for tests and small batches)."""
        n = int(self.sizes[i])
        exposures = None
        if self.exposures is not None:
            exposures = tuple(float(e) for e in self.exposures[i, :n])
        return Subgroup(
            values=tuple(float(v) for v in self.values[i, :n]),
            start=_time_at(self.start, i),
            end=_time_at(self.end, i),
            exposures=exposures,
        )

    def slice(self, begin: int, stop: int) -> SubgroupBatch:
        """Subgroups ``begin`` to ``stop - 1`` as a new batch."""
        return SubgroupBatch(
            values=self.values[begin:stop],
            sizes=self.sizes[begin:stop],
            start=None if self.start is None else self.start[begin:stop],
            end=None if self.end is None else self.end[begin:stop],
            exposures=None if self.exposures is None else self.exposures[begin:stop],
        )

    def cached(self, key: str) -> NDArray[np.float64] | None:
        """A statistic array computed earlier for this batch, shared by the charts of a set."""
        return self._cache.get(key)

    def remember(self, key: str, array: NDArray[np.float64]) -> NDArray[np.float64]:
        """Keep a statistic array for the other charts of a set; returns it."""
        self._cache[key] = array
        return array

    @cached_property
    def mask(self) -> NDArray[np.bool_]:
        """True where a row entry is a reading rather than padding."""
        return np.arange(self.values.shape[1]) < self.sizes[:, None]


def _pad(
    flat: NDArray[np.float64], sizes: NDArray[np.int64], width: int, fill: float = 0.0
) -> NDArray[np.float64]:
    rows = sizes.shape[0]
    out = np.full((rows, width), fill, dtype=np.float64)
    if rows == 0:
        return out
    if bool((sizes == width).all()):
        return np.ascontiguousarray(flat.reshape(rows, width))
    mask = np.arange(width) < sizes[:, None]
    out[mask] = flat
    return out


def _time_at(times: NDArray[np.float64] | None, i: int) -> float | None:
    if times is None:
        return None
    value = float(times[i])
    return None if math.isnan(value) else value


# ---------------------------------------------------------------- count subgroups

_COUNT_SCHEMA = 1


class CountSubgrouper:
    """Groups consecutive readings into subgroups of ``size``.

    Args:
        size: readings per subgroup (1 for individuals charts).

    Examples:
        >>> grouper = CountSubgrouper(size=2)
        >>> grouper.add(Reading(1.0, time=10.0)) is None
        True
        >>> grouper.pending
        1
        >>> CountSubgrouper.from_state(grouper.to_state()).add(Reading(3.0, time=11.0)).values
        (1.0, 3.0)
    """

    def __init__(self, *, size: int) -> None:
        if isinstance(size, bool) or not isinstance(size, int) or size < 1:
            raise ConfigError(f"subgroup size must be a positive integer, got {size!r}")
        self.size = size
        self._buffer: list[Reading] = []

    def __repr__(self) -> str:
        """Class, size and pending readings."""
        return f"CountSubgrouper(size={self.size}, pending={self.pending})"

    @property
    def pending(self) -> int:
        """Readings waiting for their subgroup to fill."""
        return len(self._buffer)

    def pending_readings(self) -> list[Reading]:
        """The readings waiting for their subgroup, oldest first."""
        return list(self._buffer)

    def add(self, reading: Reading) -> Subgroup | None:
        """Add one reading; return the subgroup it completes, if any."""
        self._buffer.append(reading)
        if len(self._buffer) < self.size:
            return None
        subgroup = Subgroup.of(self._buffer)
        self._buffer = []
        return subgroup

    def add_many(
        self,
        values: NDArray[np.float64],
        times: NDArray[np.float64],
        exposures: NDArray[np.float64] | None = None,
    ) -> SubgroupBatch:
        """Add readings given as arrays; return the subgroups they complete.

        The same subgroups, in the same order, as :meth:`add` on each reading in turn, formed
        by reshaping rather than one object per reading. With ``exposures`` every subgroup
        has exposures (1 for a waiting reading without one, as :meth:`Subgroup.of` gives);
        without, the batch has none.

        Examples:
            >>> grouper = CountSubgrouper(size=2)
            >>> grouper.add(Reading(1.0, time=10.0)) is None
            True
            >>> batch = grouper.add_many(np.array([3.0, 5.0, 7.0]), np.array([12.0, 11.0, 13.0]))
            >>> batch.values.tolist(), batch.start.tolist(), batch.end.tolist(), grouper.pending
            ([[1.0, 3.0], [5.0, 7.0]], [10.0, 11.0], [12.0, 13.0], 0)
        """
        if values.shape != times.shape or values.ndim != 1:
            raise ReadingError(f"values {values.shape} and times {times.shape} must be 1-D of one length")
        if exposures is not None and exposures.shape != values.shape:
            raise ReadingError(f"{values.shape[0]} readings were given but {exposures.shape[0]} exposures")
        if not (np.isfinite(values).all() and np.isfinite(times).all()):
            raise ReadingError("reading values and times must be finite")
        if exposures is not None and not (np.isfinite(exposures).all() and (exposures > 0).all()):
            raise ReadingError("reading exposures must be positive")
        size = self.size
        waiting = self._buffer
        if waiting:
            values = np.concatenate([np.array([r.value for r in waiting]), values])
            times = np.concatenate([np.array([r.time for r in waiting]), times])
            if exposures is not None:
                earlier = [1.0 if r.exposure is None else r.exposure for r in waiting]
                exposures = np.concatenate([np.array(earlier), exposures])
        count = values.shape[0] // size
        used = count * size
        kept = slice(used if count else len(waiting), None)  # the new readings that wait
        weights = [None] * (values.shape[0] - kept.start) if exposures is None else exposures[kept].tolist()
        rest = list(map(Reading, values[kept].tolist(), times[kept].tolist(), weights))
        # the readings that waited are all in the first subgroup, if there is one
        self._buffer = rest if count else [*waiting, *rest]
        block_times = times[:used].reshape(count, size)
        return SubgroupBatch(
            values=np.ascontiguousarray(values[:used].reshape(count, size)),
            sizes=np.full(count, size, dtype=np.int64),
            start=block_times.min(axis=1) if count else np.empty(0),
            end=block_times.max(axis=1) if count else np.empty(0),
            exposures=None
            if exposures is None
            else np.ascontiguousarray(exposures[:used].reshape(count, size)),
        )

    def to_state(self) -> State:
        """Parameters and the partial subgroup as plain data."""
        state = header("count_subgrouper", _COUNT_SCHEMA)
        state["size"] = self.size
        state["pending"] = [_reading_state(r) for r in self._buffer]
        return state

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        check_header(state, "count_subgrouper", _COUNT_SCHEMA)
        grouper = cls(size=get_int(state, "size"))
        grouper._buffer = [_reading_from(s) for s in get_state_list(state, "pending")]
        return grouper


def _reading_state(reading: Reading) -> State:
    return {"value": reading.value, "time": reading.time, "exposure": reading.exposure}


def _reading_from(state: State) -> Reading:
    return Reading(
        value=get_float(state, "value"),
        time=get_float(state, "time"),
        exposure=get_optional_float(state, "exposure"),
    )


# ---------------------------------------------------------------- time windows

_WINDOW_SCHEMA = 1


@dataclass(slots=True)
class WindowStats:
    """What a window subgrouper did with readings that did not make a subgroup."""

    late: int = 0
    """Readings that came after their window's end plus the lateness (dropped)."""
    overflow: int = 0
    """Readings for a window closed early because too many were open (dropped)."""
    short_windows: int = 0
    """Windows that closed with fewer than ``min_size`` readings (dropped)."""
    short_readings: int = 0
    """Readings in those short windows."""


class WindowSubgrouper:
    """Groups readings by clock-aligned event-time windows.

    Window ``k`` covers ``[origin + k * width, origin + (k + 1) * width)``. A window
    closes once the newest event time seen, minus ``lateness``, reaches its end, or when
    :meth:`advance` is told that time has come. Readings for a closed window are counted
    and dropped: as late, or as overflow when ``max_open`` had closed their window early.
    A window with fewer than ``min_size`` readings closes without a subgroup (counted).

    Args:
        width: window length in seconds.
        min_size: fewest readings that make a subgroup.
        lateness: how long after a window's end its readings are still accepted, in seconds.
        origin: alignment of the windows, in seconds since the epoch (0 aligns to the clock).
        max_open: most windows kept open at once; older ones are closed first.

    Examples:
        >>> w = WindowSubgrouper(width=60.0, min_size=2, lateness=5.0)
        >>> w.add(Reading(1.0, time=0.0)), w.add(Reading(2.0, time=30.0))
        ([], [])
        >>> w.add(Reading(5.0, time=64.0))  # within the lateness, window 0 stays open
        []
        >>> [s.values for s in w.add(Reading(6.0, time=66.0))]
        [(1.0, 2.0)]
        >>> w.add(Reading(9.0, time=59.0)), w.stats.late
        ([], 1)
    """

    def __init__(
        self,
        *,
        width: float,
        min_size: int = 1,
        lateness: float = 0.0,
        origin: float = 0.0,
        max_open: int = 64,
    ) -> None:
        if not (math.isfinite(width) and width > 0):
            raise ConfigError(f"window width must be a positive number of seconds, got {width!r}")
        if isinstance(min_size, bool) or not isinstance(min_size, int) or min_size < 1:
            raise ConfigError(f"min_size must be a positive integer, got {min_size!r}")
        if not (math.isfinite(lateness) and lateness >= 0):
            raise ConfigError(f"lateness must be zero or more seconds, got {lateness!r}")
        if not math.isfinite(origin):
            raise ConfigError(f"origin must be finite, got {origin!r}")
        if isinstance(max_open, bool) or not isinstance(max_open, int) or max_open < 1:
            raise ConfigError(f"max_open must be a positive integer, got {max_open!r}")
        self.width = float(width)
        self.min_size = min_size
        self.lateness = float(lateness)
        self.origin = float(origin)
        self.max_open = max_open
        self.stats = WindowStats()
        self._open: dict[int, list[Reading]] = {}
        self._closed_before = -(2**62)  # windows with a lower number are closed
        self._watermark = -math.inf

    def __repr__(self) -> str:
        """Class, width and open windows."""
        return f"WindowSubgrouper(width={self.width}, open={len(self._open)})"

    def window_of(self, time: float) -> int:
        """Number of the window holding event time ``time``."""
        return math.floor((time - self.origin) / self.width)

    def window_start(self, window: int) -> float:
        """Start time of window number ``window``."""
        return self.origin + window * self.width

    @property
    def pending(self) -> int:
        """Readings in open windows."""
        return sum(len(v) for v in self._open.values())

    def pending_readings(self) -> list[Reading]:
        """The readings in open windows, by window and arrival."""
        return [r for _, readings in sorted(self._open.items()) for r in readings]

    def add(self, reading: Reading) -> list[Subgroup]:
        """Add one reading; return the subgroups of the windows this closes, oldest first."""
        window = self.window_of(reading.time)
        if window < self._closed_before:
            if window >= self._first_open_by_time():
                self.stats.overflow += 1
            else:
                self.stats.late += 1
            return []
        self._open.setdefault(window, []).append(reading)
        closed = self._close_through(reading.time - self.lateness)
        while len(self._open) > self.max_open:
            closed.extend(self._close_oldest())
        return closed

    def advance(self, now: float) -> list[Subgroup]:
        """Close every window whose end plus lateness is at or before ``now``."""
        return self._close_through(now - self.lateness)

    def flush(self) -> list[Subgroup]:
        """Close every open window now (end of a replay); short windows are dropped as usual."""
        out: list[Subgroup] = []
        while self._open:
            out.extend(self._close_oldest())
        return out

    def _first_open_by_time(self) -> int:
        """The oldest window the event time seen so far still leaves open."""
        if math.isinf(self._watermark):
            return -(2**62)
        first_open = self.window_of(self._watermark)
        if self.window_start(first_open + 1) <= self._watermark:  # rounding guard
            first_open += 1
        return first_open

    def _close_through(self, watermark: float) -> list[Subgroup]:
        self._watermark = max(self._watermark, watermark)
        # every window whose end is at or before the watermark is complete
        first_open = self._first_open_by_time()
        out: list[Subgroup] = []
        for window in sorted(w for w in self._open if w < first_open):
            out.extend(self._close(window))
        self._closed_before = max(self._closed_before, first_open)
        return out

    def _close_oldest(self) -> list[Subgroup]:
        window = min(self._open)
        out = self._close(window)
        self._closed_before = max(self._closed_before, window + 1)
        return out

    def _close(self, window: int) -> list[Subgroup]:
        readings = self._open.pop(window)
        if len(readings) < self.min_size:
            self.stats.short_windows += 1
            self.stats.short_readings += len(readings)
            return []
        readings.sort(key=lambda r: r.time)
        subgroup = Subgroup.of(readings)
        return [
            Subgroup(
                values=subgroup.values,
                start=self.window_start(window),
                end=self.window_start(window + 1),
                exposures=subgroup.exposures,
            )
        ]

    def to_state(self) -> State:
        """Parameters, open windows and counters as plain data."""
        state = header("window_subgrouper", _WINDOW_SCHEMA)
        state.update(
            width=self.width,
            min_size=self.min_size,
            lateness=self.lateness,
            origin=self.origin,
            max_open=self.max_open,
            closed_before=self._closed_before,
            watermark=None if math.isinf(self._watermark) else self._watermark,
            late=self.stats.late,
            overflow=self.stats.overflow,
            short_windows=self.stats.short_windows,
            short_readings=self.stats.short_readings,
            windows=[
                {"window": w, "readings": [_reading_state(r) for r in rs]}
                for w, rs in sorted(self._open.items())
            ],
        )
        return state

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        check_header(state, "window_subgrouper", _WINDOW_SCHEMA)
        grouper = cls(
            width=get_float(state, "width"),
            min_size=get_int(state, "min_size"),
            lateness=get_float(state, "lateness"),
            origin=get_float(state, "origin"),
            max_open=get_int(state, "max_open"),
        )
        grouper._closed_before = get_int(state, "closed_before")
        watermark = get_optional_float(state, "watermark")
        grouper._watermark = -math.inf if watermark is None else watermark
        grouper.stats = WindowStats(
            late=get_int(state, "late"),
            overflow=get_int(state, "overflow"),
            short_windows=get_int(state, "short_windows"),
            short_readings=get_int(state, "short_readings"),
        )
        for item in get_state_list(state, "windows"):
            grouper._open[get_int(item, "window")] = [
                _reading_from(r) for r in get_state_list(item, "readings")
            ]
        return grouper
