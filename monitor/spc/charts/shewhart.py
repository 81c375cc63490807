"""Shewhart charts for the mean and the spread: X-bar with R, X-bar with S, individuals with MR.

All three judge the location statistic with a :class:`~monitor.spc.rules.RuleSet` in sigma
units and the spread statistic against its own limits (point beyond limits). Limits follow
each subgroup's own size, from the process mean and sigma (standard values or a Phase I
estimate): for the mean, ``mean -/+ L sigma / sqrt(n)``; for the range,
``(d2 -/+ L d3) sigma``; for the standard deviation, ``(c4 -/+ L sqrt(1 - c4^2)) sigma``.

Examples:
    >>> chart = XbarRChart(mean=10.0, sigma=1.0)
    >>> chart.update(Subgroup((10.2, 9.7, 10.4, 9.9, 10.1)))
    []
    >>> [round(p.value, 2) for p in chart.last_points]
    [10.06, 0.7]
    >>> signal = chart.update(Subgroup((12.1, 11.8, 12.4, 11.9, 12.2)))[0]
    >>> signal.rule.value, signal.side.value, round(signal.upper, 3)
    ('beyond_limits', 'upper', 11.342)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import ClassVar, Self

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import NDArray

from monitor.spc._state import get_float, get_float_list, get_int, get_state_list
from monitor.spc.charts._common import (
    ChartBase,
    check_finite,
    check_positive,
    index_range,
    limit_signal,
    limit_signals_from_trace,
    make_trace,
    ordered,
    require_sizes,
    rule_set_from,
    rules_state,
    signal_from_hit,
    signals_from_hits,
)
from monitor.spc.charts._math import (
    SpreadLimits,
    mean_of,
    range_limits,
    range_of,
    row_means,
    row_ranges,
    row_sds,
    sd_limits,
    sd_of,
)
from monitor.spc.charts.base import BatchResult, Point
from monitor.spc.errors import ConfigError, StateError
from monitor.spc.exact_scale import ExactScale
from monitor.spc.rules import Rule, RuleSet, western_electric
from monitor.spc.signals import Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["IndividualsChart", "XbarRChart", "XbarSChart"]


class _MeanAndSpread(ChartBase):
    """X-bar with a spread panel; subclasses choose the spread statistic."""

    kind: ClassVar[ChartKind]
    spread: ClassVar[Statistic]

    def __init__(
        self,
        *,
        mean: float,
        sigma: float,
        rules: Sequence[Rule] | None = None,
        limit_sigma: float = 3.0,
        first_index: int = 0,
        scale: ExactScale | None = None,
    ) -> None:
        super().__init__(first_index=first_index)
        self.mean = check_finite("mean", mean)
        self.sigma = check_positive("sigma", sigma)
        self.limit_sigma = check_positive("limit_sigma", limit_sigma)
        self.rules = tuple(western_electric() if rules is None else rules)
        self._rule_set = RuleSet(self.rules, limit_sigma=self.limit_sigma)
        self.scale = scale

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return (
            f"{type(self).__name__}(mean={self.mean!r}, sigma={self.sigma!r}, "
            f"limit_sigma={self.limit_sigma!r}, next_index={self._next})"
        )

    def _factors(self, n: int) -> SpreadLimits:
        raise NotImplementedError

    def _spread_of(self, values: Sequence[float], mean: float) -> float:
        raise NotImplementedError

    def _spread_rows(self, batch: SubgroupBatch) -> NDArray[np.float64]:
        raise NotImplementedError

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup (n >= 2); return its signals: mean panel first, then spread."""
        n = subgroup.n
        require_sizes(self.kind, (n,), minimum=2)
        index = self._next
        values = subgroup.values
        xbar = mean_of(values)
        if self.scale is None:
            se = self.sigma / math.sqrt(n)
            half = self.limit_sigma * se
            z = (xbar - self.mean) / se
            location = Point(Statistic.MEAN, index, n, xbar, self.mean, self.mean - half, self.mean + half)
        else:
            z = self.scale.z(xbar, n)
            location = Point(Statistic.MEAN, index, n, xbar, *self.scale.lines(n, self.limit_sigma))
        factors = self._factors(n)
        spread = Point(
            self.spread,
            index,
            n,
            self._spread_of(values, xbar),
            factors.center * self.sigma,
            factors.lower * self.sigma,
            factors.upper * self.sigma,
        )
        signals = [
            signal_from_hit(self.kind, Statistic.MEAN, hit, location, z)
            for hit in self._rule_set.update(z, index=index)
        ]
        spread_signal = limit_signal(self.kind, spread)
        if spread_signal is not None:
            signals.append(spread_signal)
        self._last_points = (location, spread)
        self._next = index + 1
        return signals

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many subgroups (vectorised); identical to ``update`` on each in turn."""
        m = len(batch)
        if m == 0:
            return BatchResult()
        require_sizes(self.kind, (int(batch.sizes.min()),), minimum=2)
        first = self._next
        index = index_range(first, m)
        sizes = batch.sizes
        means = row_means(batch)
        if self.scale is None:
            se = self.sigma / np.sqrt(sizes)
            half = self.limit_sigma * se
            z = (means - self.mean) / se
            location = make_trace(
                Statistic.MEAN, index, sizes, means, self.mean, self.mean - half, self.mean + half
            )
        else:
            z = self.scale.z_many(means, sizes)
            location = make_trace(
                Statistic.MEAN, index, sizes, means, *self.scale.lines_many(sizes, self.limit_sigma)
            )
        center, lower, upper = self._spread_factor_rows(sizes)
        spread = make_trace(
            self.spread,
            index,
            sizes,
            self._spread_rows(batch),
            center * self.sigma,
            lower * self.sigma,
            upper * self.sigma,
        )
        hits = self._rule_set.scan(z, first_index=first)
        signals = ordered(
            signals_from_hits(self.kind, Statistic.MEAN, hits, location, z, first),
            limit_signals_from_trace(self.kind, spread),
        )
        last = m - 1
        self._last_points = (
            location.point(last),
            spread.point(last),
        )
        self._next = first + m
        return BatchResult(signals=signals, traces={Statistic.MEAN: location, self.spread: spread})

    def _spread_factor_rows(
        self, sizes: NDArray[np.int64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        distinct = np.unique(sizes)
        table = {int(n): self._factors(int(n)) for n in distinct}
        if len(table) == 1:
            f = next(iter(table.values()))
            return (
                np.full(sizes.shape, f.center),
                np.full(sizes.shape, f.lower),
                np.full(sizes.shape, f.upper),
            )
        lookup = np.searchsorted(distinct, sizes)
        rows = [table[int(n)] for n in distinct]
        return (
            np.array([f.center for f in rows])[lookup],
            np.array([f.lower for f in rows])[lookup],
            np.array([f.upper for f in rows])[lookup],
        )

    def to_state(self) -> State:
        """Parameters, rule windows and counters as plain data."""
        params: State = {
            "mean": self.mean,
            "sigma": self.sigma,
            "limit_sigma": self.limit_sigma,
            "rules": rules_state(self.rules),
        }
        if self.scale is not None:
            params["scale"] = self.scale.to_state()
        state = self._base_state()
        state["rule_set"] = self._rule_set.to_state()
        return self._envelope(params, state)

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        params, inner = cls._open(state)
        chart = cls(
            mean=get_float(params, "mean"),
            sigma=get_float(params, "sigma"),
            limit_sigma=get_float(params, "limit_sigma"),
            rules=[Rule.from_state(r) for r in get_state_list(params, "rules")],
            scale=_scale_from(params),
        )
        chart._restore_base(inner)
        chart._rule_set = rule_set_from(inner, "rule_set")
        return chart


class XbarRChart(_MeanAndSpread):
    """X-bar and R chart: subgroup means judged by the rules, ranges against their limits.

    Args:
        mean: in-control process mean (center line of the mean panel).
        sigma: in-control standard deviation of single readings.
        rules: rules for the mean panel (default: the four Western Electric rules).
        limit_sigma: control limits at this many sigma (default 3).
        first_index: index of the first subgroup this chart sees.
    """

    kind = ChartKind.XBAR_R
    spread = Statistic.RANGE

    def _factors(self, n: int) -> SpreadLimits:
        return range_limits(n, self.limit_sigma)

    def _spread_of(self, values: Sequence[float], mean: float) -> float:  # noqa: ARG002
        return range_of(values)

    def _spread_rows(self, batch: SubgroupBatch) -> NDArray[np.float64]:
        return row_ranges(batch)


class XbarSChart(_MeanAndSpread):
    """X-bar and S chart: subgroup means judged by the rules, standard deviations against theirs.

    Args:
        mean: in-control process mean.
        sigma: in-control standard deviation of single readings.
        rules: rules for the mean panel (default: the four Western Electric rules).
        limit_sigma: control limits at this many sigma (default 3).
        first_index: index of the first subgroup this chart sees.
    """

    kind = ChartKind.XBAR_S
    spread = Statistic.SD

    def _factors(self, n: int) -> SpreadLimits:
        return sd_limits(n, self.limit_sigma)

    def _spread_of(self, values: Sequence[float], mean: float) -> float:
        return sd_of(values, mean)

    def _spread_rows(self, batch: SubgroupBatch) -> NDArray[np.float64]:
        return row_sds(batch)


class IndividualsChart(ChartBase):
    """Individuals and moving-range chart for one reading per subgroup.

    Args:
        mean: in-control process mean.
        sigma: in-control standard deviation of single readings.
        rules: rules for the individuals panel (default: the four Western Electric rules).
        limit_sigma: control limits at this many sigma (default 3).
        moving_range_span: readings per moving range (default 2).
        first_index: index of the first subgroup this chart sees.

    Examples:
        >>> chart = IndividualsChart(mean=50.0, sigma=2.0)
        >>> chart.update(Subgroup((51.0,)))
        []
        >>> [(s.statistic.value, s.side.value) for s in chart.update(Subgroup((58.5,)))]
        [('individual', 'upper'), ('moving_range', 'upper')]
    """

    kind = ChartKind.INDIVIDUALS

    def __init__(
        self,
        *,
        mean: float,
        sigma: float,
        rules: Sequence[Rule] | None = None,
        limit_sigma: float = 3.0,
        moving_range_span: int = 2,
        first_index: int = 0,
        scale: ExactScale | None = None,
    ) -> None:
        super().__init__(first_index=first_index)
        self.scale = scale
        self.mean = check_finite("mean", mean)
        self.sigma = check_positive("sigma", sigma)
        self.limit_sigma = check_positive("limit_sigma", limit_sigma)
        if (
            isinstance(moving_range_span, bool)
            or not isinstance(moving_range_span, int)
            or moving_range_span < 2
        ):
            raise ConfigError(
                f"moving_range_span must be an integer of at least 2, got {moving_range_span!r}"
            )
        self.moving_range_span = moving_range_span
        self.rules = tuple(western_electric() if rules is None else rules)
        self._rule_set = RuleSet(self.rules, limit_sigma=self.limit_sigma)
        self._recent: list[float] = []

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return f"IndividualsChart(mean={self.mean!r}, sigma={self.sigma!r}, next_index={self._next})"

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one reading; return its signals: individuals panel first, then moving range."""
        require_sizes(self.kind, (subgroup.n,), minimum=1, maximum=1)
        index = self._next
        x = subgroup.values[0]
        if self.scale is None:
            half = self.limit_sigma * self.sigma
            z = (x - self.mean) / self.sigma
            point = Point(Statistic.INDIVIDUAL, index, 1, x, self.mean, self.mean - half, self.mean + half)
        else:
            z = self.scale.z(x, 1)
            point = Point(Statistic.INDIVIDUAL, index, 1, x, *self.scale.lines(1, self.limit_sigma))
        signals = [
            signal_from_hit(self.kind, Statistic.INDIVIDUAL, hit, point, z)
            for hit in self._rule_set.update(z, index=index)
        ]
        points = [point]
        span = self.moving_range_span
        window = [*self._recent, x]
        if len(window) >= span:
            factors = range_limits(span, self.limit_sigma)
            moving = Point(
                Statistic.MOVING_RANGE,
                index,
                span,
                range_of(window),
                factors.center * self.sigma,
                factors.lower * self.sigma,
                factors.upper * self.sigma,
            )
            points.append(moving)
            moving_signal = limit_signal(self.kind, moving)
            if moving_signal is not None:
                signals.append(moving_signal)
        self._recent = window[-(span - 1) :]
        self._last_points = tuple(points)
        self._next = index + 1
        return signals

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many readings (vectorised); identical to ``update`` on each in turn."""
        m = len(batch)
        if m == 0:
            return BatchResult()
        require_sizes(self.kind, (int(batch.sizes.min()), int(batch.sizes.max())), minimum=1, maximum=1)
        first = self._next
        index = index_range(first, m)
        x = batch.values[:, 0]
        sizes = batch.sizes
        if self.scale is None:
            half = self.limit_sigma * self.sigma
            z = (x - self.mean) / self.sigma
            individuals = make_trace(
                Statistic.INDIVIDUAL, index, sizes, x, self.mean, self.mean - half, self.mean + half
            )
        else:
            z = self.scale.z_many(x, sizes)
            center, lower, upper = self.scale.lines(1, self.limit_sigma)
            individuals = make_trace(Statistic.INDIVIDUAL, index, sizes, x, center, lower, upper)
        span = self.moving_range_span
        joined = np.concatenate([np.asarray(self._recent, dtype=np.float64), x])
        windows = sliding_window_view(joined, span) if joined.shape[0] >= span else np.empty((0, span))
        moving_values = windows.max(axis=1) - windows.min(axis=1)
        moving_index = index[m - moving_values.shape[0] :]
        factors = range_limits(span, self.limit_sigma)
        moving = make_trace(
            Statistic.MOVING_RANGE,
            moving_index,
            np.full(moving_index.shape, span, dtype=np.int64),
            moving_values,
            factors.center * self.sigma,
            factors.lower * self.sigma,
            factors.upper * self.sigma,
        )
        hits = self._rule_set.scan(z, first_index=first)
        moving_signals = [
            (int(moving_index[pos]) - first, s) for pos, s in limit_signals_from_trace(self.kind, moving)
        ]
        signals = ordered(
            signals_from_hits(self.kind, Statistic.INDIVIDUAL, hits, individuals, z, first),
            moving_signals,
        )
        last_points = [individuals.point(m - 1)]
        if len(moving) and int(moving.subgroup[-1]) == first + m - 1:
            last_points.append(moving.point(len(moving) - 1))
        self._last_points = tuple(last_points)
        self._recent = joined[max(0, joined.shape[0] - (span - 1)) :].tolist()
        self._next = first + m
        return BatchResult(
            signals=signals,
            traces={Statistic.INDIVIDUAL: individuals, Statistic.MOVING_RANGE: moving},
        )

    def to_state(self) -> State:
        """Parameters, rule windows and the readings the next moving range needs."""
        params: State = {
            "mean": self.mean,
            "sigma": self.sigma,
            "limit_sigma": self.limit_sigma,
            "moving_range_span": self.moving_range_span,
            "rules": rules_state(self.rules),
        }
        if self.scale is not None:
            params["scale"] = self.scale.to_state()
        state = self._base_state()
        state["rule_set"] = self._rule_set.to_state()
        state["recent"] = list(self._recent)
        return self._envelope(params, state)

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        params, inner = cls._open(state)
        chart = cls(
            mean=get_float(params, "mean"),
            sigma=get_float(params, "sigma"),
            limit_sigma=get_float(params, "limit_sigma"),
            moving_range_span=get_int(params, "moving_range_span"),
            rules=[Rule.from_state(r) for r in get_state_list(params, "rules")],
            scale=_scale_from(params),
        )
        chart._restore_base(inner)
        chart._rule_set = rule_set_from(inner, "rule_set")
        chart._recent = get_float_list(inner, "recent")
        return chart


def _scale_from(params: State) -> ExactScale | None:
    found = params.get("scale")
    if found is None:
        return None
    if not isinstance(found, dict):
        raise StateError(f"chart state: scale must be a mapping, got {found!r}")
    return ExactScale.from_state(found)
