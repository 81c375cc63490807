"""Attribute charts: p for the proportion of rejects, u for defects per unit.

A subgroup's values are counts (rejects or defects) and its exposures the units inspected
(one unit per reading when none are given). With ``n`` the units inspected in a subgroup:

* p chart: ``p = rejects / n``, center ``p0``, sigma ``sqrt(p0 (1 - p0) / n)``;
* u chart: ``u = defects / n``, center ``u0``, sigma ``sqrt(u0 / n)``;

limits at ``center -/+ L sigma`` follow each subgroup's own n, the lower one floored at 0 (and
the upper p limit capped at 1). Run rules look at the standardized point, as on the other charts.

Examples:
    >>> chart = PChart(proportion=0.2313)
    >>> signal = chart.update(Subgroup((22.0,), exposures=(50.0,)))[0]
    >>> signal.rule.value, signal.value, round(signal.upper, 4)
    ('beyond_limits', 0.44, 0.4102)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import ClassVar, Self

import numpy as np
from numpy.typing import NDArray

from monitor.spc._state import get_float, get_state_list
from monitor.spc.charts._common import (
    ChartBase,
    check_positive,
    index_range,
    make_trace,
    ordered,
    rule_set_from,
    rules_state,
    signal_from_hit,
    signals_from_hits,
)
from monitor.spc.charts._math import row_totals, total_of
from monitor.spc.charts.base import BatchResult, Point
from monitor.spc.errors import ConfigError, ReadingError
from monitor.spc.rules import Rule, RuleSet
from monitor.spc.signals import Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["PChart", "UChart"]


class _AttributeChart(ChartBase):
    kind: ClassVar[ChartKind]
    statistic: ClassVar[Statistic]

    def __init__(
        self,
        *,
        center: float,
        rules: Sequence[Rule] | None,
        limit_sigma: float,
        first_index: int,
    ) -> None:
        super().__init__(first_index=first_index)
        self.center = center
        self.limit_sigma = check_positive("limit_sigma", limit_sigma)
        self.rules = tuple((Rule.beyond_limits(),) if rules is None else rules)
        self._rule_set = RuleSet(self.rules, limit_sigma=self.limit_sigma)
        self._variance_scale = self._unit_variance()

    def _unit_variance(self) -> float:
        raise NotImplementedError

    def _check_counts(
        self,
        counts: NDArray[np.float64] | float,
        exposure: NDArray[np.float64] | float,  # noqa: ARG002 - the p chart compares with it
    ) -> None:
        if np.any(np.asarray(counts) < 0):
            raise ReadingError(f"{self.kind.value} chart counts must be zero or more")

    def _cap(self) -> float:
        return math.inf

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup of counts; return the signals it raises."""
        index = self._next
        count = total_of(subgroup.values)
        exposure = float(subgroup.n) if subgroup.exposures is None else total_of(subgroup.exposures)
        self._check_counts(count, exposure)
        value = count / exposure
        se = math.sqrt(self._variance_scale / exposure)
        half = self.limit_sigma * se
        z = (value - self.center) / se
        point = Point(
            self.statistic,
            index,
            subgroup.n,
            value,
            self.center,
            max(0.0, self.center - half),
            min(self._cap(), self.center + half),
        )
        signals = [
            signal_from_hit(self.kind, self.statistic, h, point, z)
            for h in self._rule_set.update(z, index=index)
        ]
        self._last_points = (point,)
        self._next = index + 1
        return signals

    def update_many(self, batch: SubgroupBatch) -> BatchResult:
        """Add many subgroups (vectorised); identical to ``update`` on each in turn."""
        m = len(batch)
        if m == 0:
            return BatchResult()
        first = self._next
        index = index_range(first, m)
        counts = row_totals(batch.values)
        if batch.exposures is None:
            exposure = batch.sizes.astype(np.float64)
        else:
            exposure = row_totals(np.where(batch.mask, batch.exposures, 0.0))
        self._check_counts(counts, exposure)
        values = counts / exposure
        se = np.sqrt(self._variance_scale / exposure)
        half = self.limit_sigma * se
        z = (values - self.center) / se
        trace = make_trace(
            self.statistic,
            index,
            batch.sizes,
            values,
            self.center,
            np.maximum(0.0, self.center - half),
            np.minimum(self._cap(), self.center + half),
        )
        hits = self._rule_set.scan(z, first_index=first)
        signals = ordered(signals_from_hits(self.kind, self.statistic, hits, trace, z, first))
        self._last_points = (trace.point(m - 1),)
        self._next = first + m
        return BatchResult(signals=signals, traces={self.statistic: trace})

    def _params(self) -> State:
        return {
            "center": self.center,
            "limit_sigma": self.limit_sigma,
            "rules": rules_state(self.rules),
        }

    def to_state(self) -> State:
        """Parameters and rule windows as plain data."""
        state = self._base_state()
        state["rule_set"] = self._rule_set.to_state()
        return self._envelope(self._params(), state)

    @classmethod
    def _build(cls, center: float, rules: list[Rule], limit_sigma: float) -> Self:
        raise NotImplementedError

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        params, inner = cls._open(state)
        chart = cls._build(
            get_float(params, "center"),
            [Rule.from_state(r) for r in get_state_list(params, "rules")],
            get_float(params, "limit_sigma"),
        )
        chart._restore_base(inner)
        chart._rule_set = rule_set_from(inner, "rule_set")
        return chart


class PChart(_AttributeChart):
    """p chart for the proportion of rejected units.

    Args:
        proportion: in-control proportion of rejects p0, 0 < p0 < 1.
        rules: rules on the standardized proportion (default: beyond limits only).
        limit_sigma: control limits at this many sigma (default 3).
        first_index: index of the first subgroup this chart sees.
    """

    kind = ChartKind.P
    statistic = Statistic.PROPORTION

    def __init__(
        self,
        *,
        proportion: float,
        rules: Sequence[Rule] | None = None,
        limit_sigma: float = 3.0,
        first_index: int = 0,
    ) -> None:
        p = check_positive("proportion", proportion)
        if p >= 1:
            raise ConfigError(f"proportion must be below 1, got {proportion!r}")
        super().__init__(center=p, rules=rules, limit_sigma=limit_sigma, first_index=first_index)

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return f"PChart(proportion={self.center!r}, next_index={self._next})"

    def _unit_variance(self) -> float:
        return self.center * (1.0 - self.center)

    def _cap(self) -> float:
        return 1.0

    def _check_counts(
        self, counts: NDArray[np.float64] | float, exposure: NDArray[np.float64] | float
    ) -> None:
        super()._check_counts(counts, exposure)
        if np.any(np.asarray(counts) > np.asarray(exposure)):
            raise ReadingError("p chart: rejects cannot exceed the units inspected")

    @classmethod
    def _build(cls, center: float, rules: list[Rule], limit_sigma: float) -> Self:
        return cls(proportion=center, rules=rules, limit_sigma=limit_sigma)


class UChart(_AttributeChart):
    """u chart for defects per inspected unit.

    Args:
        rate: in-control defects per unit u0 > 0.
        rules: rules on the standardized rate (default: beyond limits only).
        limit_sigma: control limits at this many sigma (default 3).
        first_index: index of the first subgroup this chart sees.
    """

    kind = ChartKind.U
    statistic = Statistic.RATE

    def __init__(
        self,
        *,
        rate: float,
        rules: Sequence[Rule] | None = None,
        limit_sigma: float = 3.0,
        first_index: int = 0,
    ) -> None:
        super().__init__(
            center=check_positive("rate", rate),
            rules=rules,
            limit_sigma=limit_sigma,
            first_index=first_index,
        )

    def __repr__(self) -> str:
        """Class, parameters and next index."""
        return f"UChart(rate={self.center!r}, next_index={self._next})"

    def _unit_variance(self) -> float:
        return self.center

    @classmethod
    def _build(cls, center: float, rules: list[Rule], limit_sigma: float) -> Self:
        return cls(rate=center, rules=rules, limit_sigma=limit_sigma)
