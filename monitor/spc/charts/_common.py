"""Plumbing shared by the chart classes: validation, numbering, signals from rule hits."""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import ClassVar

import numpy as np
from numpy.typing import NDArray

from monitor.spc._state import (
    check_header,
    get_float,
    get_int,
    get_optional_float,
    get_state,
    get_state_list,
    get_str,
    header,
)
from monitor.spc.charts.base import Point, Trace
from monitor.spc.errors import ConfigError, ReadingError
from monitor.spc.rules import Rule, RuleHit, RuleSet
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.types import ChartKind, JSONValue, State, Statistic

SCHEMA = 1


def check_finite(name: str, value: float) -> float:
    """A finite float, or a ConfigError naming the parameter."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ConfigError(f"{name} must be a finite number, got {value!r}")
    return float(value)


def check_positive(name: str, value: float) -> float:
    """A finite positive float, or a ConfigError naming the parameter."""
    number = check_finite(name, value)
    if number <= 0:
        raise ConfigError(f"{name} must be greater than 0, got {value!r}")
    return number


def check_index(value: int) -> int:
    """A non-negative integer index."""
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ConfigError(f"first_index must be a non-negative integer, got {value!r}")
    return value


class ChartBase:
    """Numbering of subgroups, the latest points, and the snapshot envelope."""

    kind: ClassVar[ChartKind]

    def __init__(self, *, first_index: int) -> None:
        self._next = check_index(first_index)
        self._last_points: tuple[Point, ...] = ()

    @property
    def next_index(self) -> int:
        """Index the next subgroup will get."""
        return self._next

    @property
    def last_points(self) -> tuple[Point, ...]:
        """The points plotted for the latest subgroup, one per panel (empty before any)."""
        return self._last_points

    def _envelope(self, params: State, state: State) -> State:
        snapshot = header(self.kind.value, SCHEMA)
        snapshot["params"] = params
        snapshot["state"] = state
        return snapshot

    @classmethod
    def _open(cls, snapshot: State) -> tuple[State, State]:
        check_header(snapshot, cls.kind.value, SCHEMA)
        return get_state(snapshot, "params"), get_state(snapshot, "state")

    def _base_state(self) -> State:
        return {
            "next_index": self._next,
            "last_points": [_point_state(p) for p in self._last_points],
        }

    def _restore_base(self, state: State) -> None:
        self._next = get_int(state, "next_index")
        self._last_points = tuple(_point_from(p) for p in get_state_list(state, "last_points"))


def _point_state(point: Point) -> State:
    return {
        "statistic": point.statistic.value,
        "subgroup": point.subgroup,
        "n": point.n,
        "value": point.value,
        "center": point.center,
        "lower": point.lower,
        "upper": point.upper,
    }


def _point_from(state: State) -> Point:
    return Point(
        statistic=Statistic(get_str(state, "statistic")),
        subgroup=get_int(state, "subgroup"),
        n=get_int(state, "n"),
        value=get_float(state, "value"),
        center=get_float(state, "center"),
        lower=get_optional_float(state, "lower"),
        upper=get_optional_float(state, "upper"),
    )


def rules_state(rules: Sequence[Rule]) -> list[JSONValue]:
    """Rules as plain data (for chart parameters)."""
    return [r.to_state() for r in rules]


def require_sizes(kind: ChartKind, sizes: Iterable[int], *, minimum: int, maximum: int | None = None) -> None:
    """Refuse subgroups a chart cannot plot, naming the chart and the sizes allowed."""
    for n in sizes:
        if n < minimum or (maximum is not None and n > maximum):
            allowed = f"exactly {minimum}" if maximum == minimum else f"at least {minimum}"
            raise ReadingError(f"{kind.value} chart needs subgroups of {allowed} readings, got {n}")


def signal_from_hit(
    kind: ChartKind, statistic: Statistic, hit: RuleHit, point: Point, z: float | None
) -> Signal:
    """The signal a rule hit raises at a point."""
    return Signal(
        chart=kind,
        statistic=statistic,
        rule=hit.rule,
        side=hit.side,
        subgroup=hit.index,
        subgroups=hit.subgroups,
        value=point.value,
        center=point.center,
        lower=point.lower,
        upper=point.upper,
        z=z,
    )


def limit_signal(kind: ChartKind, point: Point, z: float | None = None) -> Signal | None:
    """A beyond-limits signal if the point lies strictly outside its limits."""
    side = None
    if point.upper is not None and point.value > point.upper:
        side = Side.UPPER
    elif point.lower is not None and point.value < point.lower:
        side = Side.LOWER
    if side is None:
        return None
    return Signal(
        chart=kind,
        statistic=point.statistic,
        rule=RuleId.BEYOND_LIMITS,
        side=side,
        subgroup=point.subgroup,
        subgroups=(point.subgroup,),
        value=point.value,
        center=point.center,
        lower=point.lower,
        upper=point.upper,
        z=z,
    )


def make_trace(
    statistic: Statistic,
    index: NDArray[np.int64],
    sizes: NDArray[np.int64],
    value: NDArray[np.float64],
    center: NDArray[np.float64] | float,
    lower: NDArray[np.float64] | float | None,
    upper: NDArray[np.float64] | float | None,
) -> Trace:
    """A trace with scalars broadcast and missing limits as NaN."""
    shape = value.shape

    def full(x: NDArray[np.float64] | float | None) -> NDArray[np.float64]:
        # constants become read-only broadcast views: no memory per point
        if x is None:
            return np.broadcast_to(np.float64(np.nan), shape)
        if isinstance(x, float | int):
            return np.broadcast_to(np.float64(x), shape)
        return x

    return Trace(statistic, index, sizes, value, full(center), full(lower), full(upper))


def limit_signals_from_trace(
    kind: ChartKind, trace: Trace, z: NDArray[np.float64] | None = None
) -> list[tuple[int, Signal]]:
    """Beyond-limits signals of a whole trace (vectorised search, objects only for hits)."""
    with np.errstate(invalid="ignore"):
        above = trace.value > trace.upper
        below = trace.value < trace.lower
    out: list[tuple[int, Signal]] = []
    for pos in np.flatnonzero(above | below).tolist():
        signal = limit_signal(kind, trace.point(pos), None if z is None else float(z[pos]))
        if signal is not None:
            out.append((pos, signal))
    return out


def signals_from_hits(
    kind: ChartKind,
    statistic: Statistic,
    hits: list[RuleHit],
    trace: Trace,
    z: NDArray[np.float64],
    first_index: int,
) -> list[tuple[int, Signal]]:
    """Signals for rule hits found by a scan over a trace."""
    out: list[tuple[int, Signal]] = []
    for hit in hits:
        pos = hit.index - first_index
        out.append((pos, signal_from_hit(kind, statistic, hit, trace.point(pos), float(z[pos]))))
    return out


def ordered(*panels: list[tuple[int, Signal]]) -> list[Signal]:
    """Signals of several panels in the streaming order: by subgroup, then panel, then rule."""
    keyed = [
        (pos, panel, order, s) for panel, items in enumerate(panels) for order, (pos, s) in enumerate(items)
    ]
    keyed.sort(key=lambda item: (item[0], item[1], item[2]))
    return [s for _, _, _, s in keyed]


def index_range(first: int, count: int) -> NDArray[np.int64]:
    """Subgroup indices of a batch."""
    return first + np.arange(count, dtype=np.int64)


def rule_set_from(state: State, key: str) -> RuleSet:
    """A rule set stored under ``key``."""
    return RuleSet.from_state(get_state(state, key))
