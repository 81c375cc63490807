"""Two-sided tabular CUSUM on standardized subgroup means, with an optional head start.

With ``y_t = (xbar_t - target) / (sigma / sqrt(n_t))`` the two one-sided sums are
``C+_t = max(0, C+_(t-1) + y_t - k)`` and ``C-_t = max(0, C-_(t-1) - y_t - k)``, in sigma units
of the subgroup mean; the chart signals when one exceeds ``h`` (Page 1954; Montgomery, CUSUM
chapter). A head start sets both sums to that value at the start (Lucas and Crosier 1982).

Both paths compute the sums in the cumulative-sum form ``C_t = S_t - min(0, S_1..S_t)``
(cumulative sums run left to right), re-based every 4096 subgroups, so the streaming and the
batch path agree to the last bit.

Examples:
    >>> chart = CusumChart(mean=10.0, sigma=1.0, k=0.5, h=5.0)
    >>> for x in (9.45, 7.99, 11.66):
    ...     _ = chart.update(Subgroup((x,)))
    >>> [round(p.value, 2) for p in chart.last_points]
    [1.16, 0.0]
"""

from __future__ import annotations

import math
from typing import ClassVar, Self

import numpy as np
from numpy.typing import NDArray

from monitor.spc._state import get_float, get_int
from monitor.spc.charts._common import (
    ChartBase,
    check_finite,
    check_positive,
    index_range,
    make_trace,
    ordered,
)
from monitor.spc.charts._math import mean_of, row_means
from monitor.spc.charts.base import BatchResult, Point, Trace
from monitor.spc.errors import ConfigError
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["CusumChart"]

REBASE_EVERY = 4096
"""Subgroups between re-basings of the cumulative sums (keeps them small)."""

LISTED = 64
"""Most subgroups a signal lists; a long shift is summarised by its ``run_start``."""


class _Side:
    """One one-sided sum in cumulative form: C = S - M, M = min(0, S_1..S_t)."""

    __slots__ = ("last_zero", "low", "total")

    def __init__(self, start: float, last_zero: int) -> None:
        self.total = start
        self.low = 0.0
        self.last_zero = last_zero

    def step(self, increment: float, index: int) -> float:
        self.total += increment
        self.low = min(self.low, self.total)
        value = self.total - self.low
        if value == 0.0:
            self.last_zero = index
        return value

    def steps(
        self, increments: NDArray[np.float64], index: NDArray[np.int64]
    ) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
        totals = np.cumsum(np.concatenate([[self.total], increments]))[1:]
        lows = np.minimum.accumulate(np.concatenate([[self.low], totals]))[1:]
        values = totals - lows
        last_zero = np.maximum.accumulate(np.where(values == 0.0, index, self.last_zero))
        self.total, self.low, self.last_zero = (
            float(totals[-1]),
            float(lows[-1]),
            int(last_zero[-1]),
        )
        return values, last_zero

    def rebase(self) -> None:
        self.total -= self.low
        self.low = 0.0


class CusumChart(ChartBase):
    """Two-sided tabular CUSUM of subgroup means, k and h in sigma units of the mean.

    Args:
        mean: target (in-control mean).
        sigma: in-control standard deviation of single readings.
        k: reference value (allowance), usually half the shift to detect (default 0.5).
        h: decision interval (default 5).
        head_start: starting value of both sums (fast initial response), 0 <= head start < h.
        first_index: index of the first subgroup this chart sees.
    """

    kind: ClassVar[ChartKind] = ChartKind.CUSUM

    def __init__(
        self,
        *,
        mean: float,
        sigma: float,
        k: float = 0.5,
        h: float = 5.0,
        head_start: float = 0.0,
        first_index: int = 0,
    ) -> None:
        super().__init__(first_index=first_index)
        self.mean = check_finite("mean", mean)
        self.sigma = check_positive("sigma", sigma)
        self.k = check_finite("k", k)
        if self.k < 0:
            raise ConfigError(f"k must be zero or more, got {k!r}")
        self.h = check_positive("h", h)
        self.head_start = check_finite("head_start", head_start)
        if not 0 <= self.head_start < self.h:
            raise ConfigError(f"head_start must be at least 0 and below h ({self.h}), got {head_start!r}")
        self._upper = _Side(self.head_start, first_index - 1)
        self._lower = _Side(self.head_start, first_index - 1)
        self._seen = 0

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return (
            f"CusumChart(mean={self.mean!r}, sigma={self.sigma!r}, k={self.k!r}, h={self.h!r}, "
            f"next_index={self._next})"
        )

    def shift_estimate(self, signal: Signal, n: int = 1) -> float:
        """The process mean suggested by a CUSUM signal: target -/+ sigma/sqrt(n) (k + C / N).

        N is the number of subgroups since the sum last was zero (Montgomery, CUSUM chapter).
        """
        start = signal.subgroups[0] if signal.run_start is None else signal.run_start
        steps = signal.subgroup - start + 1
        move = (self.sigma / math.sqrt(n)) * (self.k + signal.value / steps)
        return self.mean + move if signal.side is Side.UPPER else self.mean - move

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup; return a signal per side whose sum exceeds h."""
        index = self._next
        n = subgroup.n
        if self._seen and self._seen % REBASE_EVERY == 0:
            self._upper.rebase()
            self._lower.rebase()
        y = (mean_of(subgroup.values) - self.mean) / (self.sigma / math.sqrt(n))
        upper = self._upper.step(y - self.k, index)
        lower = self._lower.step(-y - self.k, index)
        points = (
            Point(Statistic.CUSUM_UPPER, index, n, upper, 0.0, None, self.h),
            Point(Statistic.CUSUM_LOWER, index, n, lower, 0.0, None, self.h),
        )
        signals = []
        for point, side, state in (
            (points[0], Side.UPPER, self._upper),
            (points[1], Side.LOWER, self._lower),
        ):
            if point.value > self.h:
                signals.append(self._signal(point, side, state.last_zero + 1))
        self._seen += 1
        self._next = index + 1
        self._last_points = points
        return signals

    def _signal(self, point: Point, side: Side, since: int) -> Signal:
        return Signal(
            chart=self.kind,
            statistic=point.statistic,
            rule=RuleId.BEYOND_LIMITS,
            side=side,
            subgroup=point.subgroup,
            subgroups=tuple(range(max(since, point.subgroup - LISTED + 1), point.subgroup + 1)),
            value=point.value,
            center=0.0,
            lower=None,
            upper=self.h,
            run_start=since,
        )

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many subgroups (vectorised); identical to ``update`` on each in turn."""
        m = len(batch)
        if m == 0:
            return BatchResult()
        first = self._next
        index = index_range(first, m)
        y = (row_means(batch) - self.mean) / (self.sigma / np.sqrt(batch.sizes))
        up_inc, low_inc = y - self.k, -y - self.k
        upper, lower = np.empty(m), np.empty(m)
        upper_zero, lower_zero = np.empty(m, dtype=np.int64), np.empty(m, dtype=np.int64)
        start = 0
        while start < m:
            seen = self._seen + start
            if seen and seen % REBASE_EVERY == 0:
                self._upper.rebase()
                self._lower.rebase()
            stop = min(m, start + REBASE_EVERY - seen % REBASE_EVERY)
            part = slice(start, stop)
            upper[part], upper_zero[part] = self._upper.steps(up_inc[part], index[part])
            lower[part], lower_zero[part] = self._lower.steps(low_inc[part], index[part])
            start = stop
        traces = {
            Statistic.CUSUM_UPPER: make_trace(
                Statistic.CUSUM_UPPER, index, batch.sizes, upper, 0.0, None, self.h
            ),
            Statistic.CUSUM_LOWER: make_trace(
                Statistic.CUSUM_LOWER, index, batch.sizes, lower, 0.0, None, self.h
            ),
        }
        found: list[list[tuple[int, Signal]]] = []
        for trace, side, zeros in (
            (traces[Statistic.CUSUM_UPPER], Side.UPPER, upper_zero),
            (traces[Statistic.CUSUM_LOWER], Side.LOWER, lower_zero),
        ):
            found.append(self._signals_over(trace, side, zeros))
        self._seen += m
        self._next = first + m
        self._last_points = (
            traces[Statistic.CUSUM_UPPER].point(m - 1),
            traces[Statistic.CUSUM_LOWER].point(m - 1),
        )
        return BatchResult(signals=ordered(*found), traces=traces)

    def _signals_over(self, trace: Trace, side: Side, zeros: NDArray[np.int64]) -> list[tuple[int, Signal]]:
        return [
            (pos, self._signal(trace.point(pos), side, int(zeros[pos]) + 1))
            for pos in np.flatnonzero(trace.value > self.h).tolist()
        ]

    def to_state(self) -> State:
        """Parameters and both sums (in cumulative form) as plain data."""
        params: State = {
            "mean": self.mean,
            "sigma": self.sigma,
            "k": self.k,
            "h": self.h,
            "head_start": self.head_start,
        }
        state = self._base_state()
        state.update(
            seen=self._seen,
            upper_total=self._upper.total,
            upper_low=self._upper.low,
            upper_last_zero=self._upper.last_zero,
            lower_total=self._lower.total,
            lower_low=self._lower.low,
            lower_last_zero=self._lower.last_zero,
        )
        return self._envelope(params, state)

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        params, inner = cls._open(state)
        chart = cls(
            mean=get_float(params, "mean"),
            sigma=get_float(params, "sigma"),
            k=get_float(params, "k"),
            h=get_float(params, "h"),
            head_start=get_float(params, "head_start"),
        )
        chart._restore_base(inner)
        chart._seen = get_int(inner, "seen")
        chart._upper.total = get_float(inner, "upper_total")
        chart._upper.low = get_float(inner, "upper_low")
        chart._upper.last_zero = get_int(inner, "upper_last_zero")
        chart._lower.total = get_float(inner, "lower_total")
        chart._lower.low = get_float(inner, "lower_low")
        chart._lower.last_zero = get_int(inner, "lower_last_zero")
        return chart
