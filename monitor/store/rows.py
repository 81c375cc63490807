"""The rows the store writes and reads: plain dataclasses, JSON fields as plain dicts.

Times are epoch milliseconds. JSON fields (``points``, ``detail``, ``event``, checkpoint
states) must hold only what :func:`json.dumps` accepts: dicts, lists, strings, finite
floats, integers, booleans and ``None``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["AlertRow", "CommitBatch", "LimitsRow", "OutboxAlert", "SignalRow", "StoredAck", "SubgroupRow"]


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
