"""The rows the store writes and reads: plain dataclasses, JSON fields as plain dicts.

Times are epoch milliseconds. JSON fields (``points``, ``detail``, ``event``, checkpoint
states) must hold only what :func:`json.dumps` accepts: dicts, lists, strings, finite
floats, integers, booleans and ``None``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "AlertRow",
    "CommitBatch",
    "LimitsRow",
    "OutboxAlert",
    "Panel",
    "SignalRow",
    "StoredAck",
    "SubgroupBlock",
    "SubgroupRow",
]


@dataclass(frozen=True)
class SubgroupRow:
    """One closed subgroup of a chart and the statistics plotted for it.

    ``points`` maps chart kind and statistic to ``value``, ``center``, ``lower``, ``upper``;
    it is empty for a subgroup collected for a Phase I baseline (not charted). ``values`` are
    the readings themselves and ``exposures`` their units inspected (attribute charts); both
    are None on rows written before readings were kept.
    """

    chart: str
    index: int
    start_ms: int | None
    end_ms: int | None
    n: int
    points: dict[str, object]
    values: tuple[float, ...] | None = None
    exposures: tuple[float, ...] | None = None


@dataclass(frozen=True, eq=False)
class Panel:
    """One plotted statistic over a block of subgroups: a point for each.

    A NaN limit is a limit the point does not have; a NaN value, a subgroup without a point
    on this panel (the first subgroup has no moving range).
    """

    kind: str
    statistic: str
    value: NDArray[np.float64]
    center: NDArray[np.float64]
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class SubgroupBlock:
    """Consecutive subgroups of one chart, all of ``n`` readings, as arrays (the batch path).

    Stored as the rows :meth:`rows` lists, without an object per subgroup on the way.

    Examples:
        >>> import numpy as np
        >>> two = np.full(2, 1.0)
        >>> mean = Panel("xbar_r", "mean", np.array([8.0, 8.5]), 8.0 * two, 7.9 * two, np.nan * two)
        >>> block = SubgroupBlock("press/thickness", 7, np.array([1.0, 3.0]), np.array([2.0, 4.0]),
        ...                       np.array([[7.9, 8.1], [8.4, 8.6]]), (mean,))
        >>> block.rows()[1]  # doctest: +NORMALIZE_WHITESPACE
        SubgroupRow(chart='press/thickness', index=8, start_ms=3000, end_ms=4000, n=2,
            points={'xbar_r': {'mean': {'value': 8.5, 'center': 8.0, 'lower': 7.9, 'upper': None}}},
            values=(8.4, 8.6), exposures=None)
    """

    chart: str
    first_index: int
    start: NDArray[np.float64]
    """Event time of each subgroup's first reading, seconds since the epoch."""
    end: NDArray[np.float64]
    values: NDArray[np.float64]
    """The readings, one row per subgroup."""
    panels: tuple[Panel, ...]

    def __len__(self) -> int:
        """Number of subgroups."""
        return int(self.values.shape[0])

    def rows(self) -> list[SubgroupRow]:
        """The block as one :class:`SubgroupRow` per subgroup."""
        out = []
        for i, readings in enumerate(self.values.tolist()):
            points: dict[str, object] = {}
            for p in self.panels:
                if math.isnan(p.value[i]):
                    continue
                by_statistic = points.setdefault(p.kind, {})
                by_statistic[p.statistic] = {  # type: ignore[index]
                    "value": float(p.value[i]),
                    "center": float(p.center[i]),
                    "lower": _or_none(float(p.lower[i])),
                    "upper": _or_none(float(p.upper[i])),
                }
            start, end = float(self.start[i]), float(self.end[i])
            out.append(
                SubgroupRow(
                    self.chart,
                    self.first_index + i,
                    round(start * 1000),
                    round(end * 1000),
                    len(readings),
                    points,
                    tuple(readings),
                )
            )
        return out


def _or_none(value: float) -> float | None:
    return None if math.isnan(value) else value


@dataclass(frozen=True)
class SignalRow:
    """One rule that fired on one statistic of one subgroup; ``alert_id`` links its alert."""

    chart: str
    subgroup: int
    kind: str
    statistic: str
    rule: str
    side: str
    value: float
    center: float
    lower: float | None
    upper: float | None
    z: float | None
    p_value: float | None
    method: str | None
    alert_id: str | None


@dataclass(frozen=True)
class AlertRow:
    """One alert to publish: ``event`` is the complete CloudEvents JSON object."""

    id: str
    chart: str
    event_type: str
    created_ms: int
    event: dict[str, object]


@dataclass(frozen=True)
class LimitsRow:
    """One version of a chart's limits: where they came from and how they were estimated."""

    chart: str
    version: int
    mean: float
    sigma: float | None
    source: str
    detail: dict[str, object]
    created_ms: int


@dataclass
class CommitBatch:
    """Everything written in one transaction; ``checkpoints`` maps chart to its JSON state.

    ``sent`` lists alerts published since the last commit with when (ms): the outbox marks
    them sent in the same transaction (the first time is kept).
    """

    subgroups: list[SubgroupRow] = field(default_factory=list)
    blocks: list[SubgroupBlock] = field(default_factory=list)
    """More subgroups, stored like ``subgroups``."""
    signals: list[SignalRow] = field(default_factory=list)
    alerts: list[AlertRow] = field(default_factory=list)
    limits: list[LimitsRow] = field(default_factory=list)
    checkpoints: dict[str, dict[str, object]] = field(default_factory=dict)
    sent: list[tuple[str, int]] = field(default_factory=list)


@dataclass(frozen=True)
class OutboxAlert:
    """An alert not yet published, with the number of attempts made so far."""

    id: str
    chart: str
    event_type: str
    event: dict[str, object]
    attempts: int


@dataclass(frozen=True)
class StoredAck:
    """An operator's acknowledgement of an alert: who, when, and what they noted."""

    alert_id: str
    chart: str
    by: str
    note: str
    at_ms: int
