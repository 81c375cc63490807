"""EWMA chart with exact time-varying limits and optional fast initial response.

The statistic is ``e_t = lambda * xbar_t + (1 - lambda) * e_(t-1)``, started at the target.
Its exact in-control variance follows each subgroup's own size:
``V_t = lambda^2 sigma^2 / n_t + (1 - lambda)^2 V_(t-1)``, ``V_0 = 0``, which for a constant n is
``sigma^2 / n * lambda / (2 - lambda) * (1 - (1 - lambda)^(2t))`` (Lucas and Saccucci 1990).
Limits are ``target -/+ L sqrt(V_t)`` from the first point.

The optional fast initial response narrows the first limits by the factor
``1 - (1 - f)^(1 + a (t - 1))`` (Steiner 1999, *Journal of Quality Technology* 31),
with f = 0.5 and a = 0.3 by default.

The batch path runs the same recursions through ``scipy.signal.lfilter``, which performs the
same operations in the same order, so both paths agree to the last bit.

Examples:
    >>> chart = EwmaChart(mean=50.0, sigma=2.0539, smoothing=0.3, width=3.0)
    >>> for x in (52.0, 47.0, 53.0):
    ...     _ = chart.update(Subgroup((x,)))
    ...     print(round(chart.last_points[0].value, 2))
    50.6
    49.52
    50.56
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import ClassVar, Self

import numpy as np

from monitor.spc._state import get_bool, get_float, get_int
from monitor.spc.charts._common import (
    ChartBase,
    check_finite,
    check_positive,
    index_range,
    limit_signal,
    limit_signals_from_trace,
    make_trace,
    ordered,
)
from monitor.spc.charts._math import mean_of, row_means
from monitor.spc.charts.base import BatchResult, Point
from monitor.spc.errors import ConfigError
from monitor.spc.signals import Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["EwmaChart"]


@lru_cache(maxsize=64)
def _response_factors(fraction: float, decay: float) -> tuple[float, ...]:
    """Fast-initial-response factors for t = 1, 2, ... until they reach 1.0 exactly."""
    factors: list[float] = []
    t = 1
    while True:
        factor = 1.0 - math.pow(1.0 - fraction, 1.0 + decay * (t - 1))
        if factor >= 1.0 or t > 100_000:
            return tuple(factors)
        factors.append(factor)
        t += 1


class EwmaChart(ChartBase):
    """EWMA chart of subgroup means (or individual readings).

    Args:
        mean: target (in-control mean); the EWMA starts here.
        sigma: in-control standard deviation of single readings.
        smoothing: the weight lambda of the newest subgroup, 0 < lambda <= 1.
        width: limits at this many standard deviations of the EWMA (L).
        fast_initial_response: narrow the first limits (Steiner 1999).
        response_fraction: f of the fast initial response (0 < f < 1).
        response_decay: a of the fast initial response (a > 0).
        first_index: index of the first subgroup this chart sees.
    """

    kind: ClassVar[ChartKind] = ChartKind.EWMA

    def __init__(
        self,
        *,
        mean: float,
        sigma: float,
        smoothing: float = 0.2,
        width: float = 3.0,
        fast_initial_response: bool = False,
        response_fraction: float = 0.5,
        response_decay: float = 0.3,
        first_index: int = 0,
    ) -> None:
        super().__init__(first_index=first_index)
        self.mean = check_finite("mean", mean)
        self.sigma = check_positive("sigma", sigma)
        self.smoothing = check_positive("smoothing (lambda)", smoothing)
        if self.smoothing > 1:
            raise ConfigError(f"smoothing (lambda) must be at most 1, got {smoothing!r}")
        self.width = check_positive("width (L)", width)
        self.fast_initial_response = bool(fast_initial_response)
        self.response_fraction = check_positive("response_fraction", response_fraction)
        if self.response_fraction >= 1:
            raise ConfigError(f"response_fraction must be below 1, got {response_fraction!r}")
        self.response_decay = check_positive("response_decay", response_decay)
        self._keep = 1.0 - self.smoothing
        self._keep_squared = self._keep * self._keep
        self._input_scale = (self.smoothing * self.smoothing) * (self.sigma * self.sigma)
        self._value = self.mean
        self._variance = 0.0
        self._seen = 0

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return (
            f"EwmaChart(mean={self.mean!r}, sigma={self.sigma!r}, smoothing={self.smoothing!r}, "
            f"width={self.width!r}, next_index={self._next})"
        )

    @property
    def value(self) -> float:
        """The current EWMA."""
        return self._value

    def _factor(self, t: int) -> float:
        if not self.fast_initial_response:
            return 1.0
        table = _response_factors(self.response_fraction, self.response_decay)
        return table[t - 1] if t <= len(table) else 1.0

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup; return a beyond-limits signal if the EWMA leaves its limits."""
        index = self._next
        n = subgroup.n
        value = self.smoothing * mean_of(subgroup.values) + self._keep * self._value
        variance = self._input_scale / n + self._keep_squared * self._variance
        sd = math.sqrt(variance)
        half = (self.width * self._factor(self._seen + 1)) * sd
        point = Point(Statistic.EWMA, index, n, value, self.mean, self.mean - half, self.mean + half)
        self._value, self._variance = value, variance
        self._seen += 1
        self._next = index + 1
        self._last_points = (point,)
        signal = limit_signal(self.kind, point, (value - self.mean) / sd)
        return [] if signal is None else [signal]

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many subgroups (vectorised); identical to ``update`` on each in turn."""
        m = len(batch)
        if m == 0:
            return BatchResult()
        from scipy.signal import lfilter  # noqa: PLC0415 - scipy.signal takes ~0.3 s to import: only batches need it

        first = self._next
        index = index_range(first, m)
        values, _ = lfilter(
            [self.smoothing], [1.0, -self._keep], row_means(batch), zi=[self._keep * self._value]
        )
        variances, _ = lfilter(
            [1.0],
            [1.0, -self._keep_squared],
            self._input_scale / batch.sizes,
            zi=[self._keep_squared * self._variance],
        )
        sd = np.sqrt(variances)
        factors = np.ones(m)
        if self.fast_initial_response:
            table = _response_factors(self.response_fraction, self.response_decay)
            early = min(m, max(0, len(table) - self._seen))
            factors[:early] = table[self._seen : self._seen + early]
        half = (self.width * factors) * sd
        trace = make_trace(
            Statistic.EWMA,
            index,
            batch.sizes,
            values,
            self.mean,
            self.mean - half,
            self.mean + half,
        )
        z = (values - self.mean) / sd
        signals = ordered(limit_signals_from_trace(self.kind, trace, z))
        self._value, self._variance = float(values[-1]), float(variances[-1])
        self._seen += m
        self._next = first + m
        self._last_points = (trace.point(m - 1),)
        return BatchResult(signals=signals, traces={Statistic.EWMA: trace})

    def to_state(self) -> State:
        """Parameters, the EWMA, its variance and the subgroup count as plain data."""
        params: State = {
            "mean": self.mean,
            "sigma": self.sigma,
            "smoothing": self.smoothing,
            "width": self.width,
            "fast_initial_response": self.fast_initial_response,
            "response_fraction": self.response_fraction,
            "response_decay": self.response_decay,
        }
        state = self._base_state()
        state.update(value=self._value, variance=self._variance, seen=self._seen)
        return self._envelope(params, state)

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        params, inner = cls._open(state)
        chart = cls(
            mean=get_float(params, "mean"),
            sigma=get_float(params, "sigma"),
            smoothing=get_float(params, "smoothing"),
            width=get_float(params, "width"),
            fast_initial_response=get_bool(params, "fast_initial_response"),
            response_fraction=get_float(params, "response_fraction"),
            response_decay=get_float(params, "response_decay"),
        )
        chart._restore_base(inner)
        chart._value = get_float(inner, "value")
        chart._variance = get_float(inner, "variance")
        chart._seen = get_int(inner, "seen")
        return chart
