"""Signals: one rule violation at one subgroup of one chart."""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

from monitor.spc.types import ChartKind, Statistic

__all__ = ["RuleId", "Side", "Signal"]


class RuleId(StrEnum):
    """Descriptive identifiers of the rules (stable strings for storage and alerts).

    The pattern each one detects, in zone terms (sigma of the plotted statistic):
    """

    BEYOND_LIMITS = "beyond_limits"
    """A point outside the control limits."""
    OUTER_ZONE_CLUSTER = "outer_zone_cluster"
    """Several of the last few points beyond 2 sigma on one side (2 of 3 by default)."""
    MIDDLE_ZONE_CLUSTER = "middle_zone_cluster"
    """Several of the last few points beyond 1 sigma on one side (4 of 5 by default)."""
    SAME_SIDE_RUN = "same_side_run"
    """A run of points on one side of the center line."""
    STEADY_TREND = "steady_trend"
    """A run of points each higher (or each lower) than the one before."""
    ALTERNATING_RUN = "alternating_run"
    """A run of points alternating up and down."""
    HUGGING_CENTER = "hugging_center"
    """A run of points all within 1 sigma of the center line (too little variation)."""
    AVOIDING_CENTER = "avoiding_center"
    """A run of points all beyond 1 sigma, on both sides (a mixture)."""


class Side(StrEnum):
    """Which way a signal points."""

    UPPER = "upper"
    LOWER = "lower"
    EITHER = "either"
    """Patterns without a direction (alternation, hugging or avoiding the center)."""


@dataclass(frozen=True, slots=True)
class Signal:
    """One rule violation at one subgroup.

    Attributes:
        chart: the chart kind that raised it.
        statistic: the plotted statistic the rule looked at.
        rule: which rule.
        side: which way it points.
        subgroup: index of the subgroup that completed the pattern.
        subgroups: indices of all subgroups in the pattern, oldest first.
        value: the statistic at ``subgroup``.
        center: the center line there.
        lower: the lower control limit there (None if the chart has none).
        upper: the upper control limit there (None if the chart has none).
        z: the statistic in sigma units from the center, where that is defined.
        run_start: for CUSUM signals, the first subgroup since the sum was last zero (the
            estimated start of the shift); ``subgroups`` then lists at most the last 64.
    """

    chart: ChartKind
    statistic: Statistic
    rule: RuleId
    side: Side
    subgroup: int
    subgroups: tuple[int, ...]
    value: float
    center: float
    lower: float | None
    upper: float | None
    z: float | None = None
    run_start: int | None = None
