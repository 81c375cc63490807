"""What every chart shares: plotted points, batch results, and the chart interface."""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import ClassVar, Protocol, Self

import numpy as np
from numpy.typing import NDArray

from monitor.spc.signals import Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["BatchResult", "Chart", "Point", "Trace"]


@dataclass(frozen=True, slots=True)
class Point:
    """One plotted point of one panel: the statistic, its center line and limits there."""

    statistic: Statistic
    subgroup: int
    n: int
    value: float
    center: float
    lower: float | None
    upper: float | None


def _nan_to_none(value: float) -> float | None:
    return None if math.isnan(value) else value


@dataclass(frozen=True, eq=False)
class Trace:
    """The points of one panel over a batch, as arrays (NaN where a limit does not exist)."""

    statistic: Statistic
    subgroup: NDArray[np.int64]
    n: NDArray[np.int64]
    value: NDArray[np.float64]
    center: NDArray[np.float64]
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]

    def __len__(self) -> int:
        """Number of points."""
        return int(self.subgroup.shape[0])

    def point(self, i: int) -> Point:
        """Point number ``i`` of the trace as an object."""
        return Point(
            statistic=self.statistic,
            subgroup=int(self.subgroup[i]),
            n=int(self.n[i]),
            value=float(self.value[i]),
            center=float(self.center[i]),
            lower=_nan_to_none(float(self.lower[i])),
            upper=_nan_to_none(float(self.upper[i])),
        )

    def points(self) -> Iterator[Point]:
        """The points one by one (for output and tests; slow on big batches)."""
        for i in range(len(self)):
            yield self.point(i)


@dataclass(frozen=True, eq=False)
class BatchResult:
    """What a batch update produced: the signals in order, and the plotted points per panel."""

    signals: list[Signal] = field(default_factory=list)
    traces: dict[Statistic, Trace] = field(default_factory=dict)


class Chart(Protocol):
    """The interface of every chart object."""

    kind: ClassVar[ChartKind]

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup; return the signals it raises (usually none)."""
        ...

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many subgroups at once; identical to calling ``update`` on each in turn."""
        ...

    @property
    def last_points(self) -> tuple[Point, ...]:
        """The points plotted for the latest subgroup, one per panel."""
        ...

    @property
    def next_index(self) -> int:
        """Index the next subgroup will get."""
        ...

    def to_state(self) -> State:
        """Parameters and full state as plain JSON-serialisable data."""
        ...

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild a chart from :meth:`to_state`."""
        ...
