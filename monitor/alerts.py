"""Alerts: what people receive when a chart's rules signal (a pure state machine, no I/O).

One :class:`AlertTracker` per chart turns the signals of each charted subgroup into at most
one :class:`Alert`: *raised* when the chart goes out of control, *repeated* (rate-limited, and
never after an acknowledgement) while it stays out of control, *cleared* after a run of quiet
subgroups. Each alert carries a CloudEvents 1.0 structured-mode JSON object (``event``), ready
to publish on ``<prefix>/alerts/<chart>``; :meth:`AlertTracker.status` gives the body of the
retained ``<prefix>/status/<chart>`` message, and :func:`parse_ack` reads what crews send on
``<prefix>/ack/<chart>``.

Nothing here reads a clock, draws randomness or touches the network: times arrive as epoch
milliseconds and alert ids are derived from the chart, the subgroup and a per-chart sequence,
so a subgroup processed again after a crash (from the last snapshot) yields the same ids and
consumers can drop the duplicate on ``source`` + ``id``.

This is advisory monitoring: every alert carries :data:`ADVISORY`.

Examples:
    >>> from monitor.spc import ChartKind, RuleId, Side, Signal, Statistic
    >>> tracker = AlertTracker("press-1/thickness", AlertSettings())
    >>> signal = Signal(ChartKind.XBAR_R, Statistic.MEAN, RuleId.BEYOND_LIMITS, Side.UPPER,
    ...                 143, (143,), 8.061, 8.0, 7.946, 8.054)
    >>> context = SignalContext(chart_id="press-1/thickness", hint="Check the die inserts.",
    ...     limits_version=1, subgroup_start_ms=None, subgroup_end_ms=1_772_000_000_000,
    ...     subgroup_size=5, p_value=0.0004, p_value_method="closed_form",
    ...     parent_model="normal", name="Tile thickness")
    >>> [alert] = tracker.observe([signal], [context], subgroup_index=143, now_ms=1_772_000_001_000)
    >>> alert.kind.value, tracker.state.value, alert.topic
    ('raised', 'out_of_control', 'line-monitor/alerts/press-1/thickness')
    >>> print(alert.event["data"]["message"])
    Tile thickness on press-1/thickness: the average of the last 5 readings, 8.061, is above its
    upper control limit 8.054 (subgroup 143, 06:13:20 UTC).
    >>> from dataclasses import replace
    >>> again = replace(signal, subgroup=144, subgroups=(144,), value=8.07)
    >>> tracker.observe([again], [context], subgroup_index=144, now_ms=1_772_000_061_000)
    []
    >>> tracker.acknowledge(alert.id, "J. Doe", 1_772_000_090_000)
    True
    >>> for i in range(145, 150):
    ...     quiet = tracker.observe([], [], subgroup_index=i, now_ms=1_772_000_100_000 + i)
    ...     print([a.kind.value for a in quiet])
    []
    []
    []
    []
    ['cleared']
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from enum import StrEnum
from types import MappingProxyType
from typing import Final, Self, TypeVar

import orjson

from monitor.spc.errors import ConfigError, MonitorError, StateError
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.types import Statistic
from monitor.topics import is_chart_id

__all__ = [
    "ADVISORY",
    "EVENT_TYPES",
    "AckError",
    "AckRequest",
    "Alert",
    "AlertKind",
    "AlertSettings",
    "AlertTracker",
    "ChartState",
    "Severity",
    "SignalContext",
    "alert_id",
    "describe",
    "parse_ack",
    "topics",
]

ADVISORY: Final = (
    "Advisory only: this is statistical evidence for people, not a safety system. No interlock, "
    "trip or shutdown may depend on it; follow local codes and licensed practice."
)
"""The caution every alert and status message carries."""


class ChartState(StrEnum):
    """Where a chart stands, as alerting sees it."""

    IN_CONTROL = "in_control"
    OUT_OF_CONTROL = "out_of_control"
    COLLECTING_BASELINE = "collecting_baseline"


class AlertKind(StrEnum):
    """What an alert says about its chart."""

    RAISED = "raised"
    """The chart went out of control."""
    REPEATED = "repeated"
    """The chart is still out of control and nobody has acknowledged it (rate-limited)."""
    CLEARED = "cleared"
    """The chart is back in control."""


class Severity(StrEnum):
    """How urgently a signal deserves a look."""

    INFO = "info"
    WARNING = "warning"
    CRITICAL = "critical"


_RANK: Final = {Severity.INFO: 0, Severity.WARNING: 1, Severity.CRITICAL: 2}

EVENT_TYPES: Final = MappingProxyType({kind: f"line-monitor.alert.{kind.value}" for kind in AlertKind})
"""The CloudEvents ``type`` of each alert kind."""

DEFAULT_SEVERITY: Final = MappingProxyType(
    {
        RuleId.BEYOND_LIMITS.value: Severity.CRITICAL,
        RuleId.OUTER_ZONE_CLUSTER.value: Severity.WARNING,
        RuleId.MIDDLE_ZONE_CLUSTER.value: Severity.WARNING,
        RuleId.SAME_SIDE_RUN.value: Severity.WARNING,
        RuleId.STEADY_TREND.value: Severity.WARNING,
        RuleId.ALTERNATING_RUN.value: Severity.INFO,
        RuleId.HUGGING_CENTER.value: Severity.INFO,
        RuleId.AVOIDING_CENTER.value: Severity.INFO,
    }
)
"""Severity of each rule unless the settings say otherwise.

A point beyond the limits is the strongest evidence; clusters, runs and trends show a
shift building up; the three patterns without a direction usually point at how the data is
gathered (mixed sources, stale limits, rounding) rather than at a change needing action now.
"""

_URI_REFERENCE_CHARS: Final = re.compile(r"[A-Za-z0-9\-._~:/?#\[\]@!$&'()*+,;=%]+")
_MAX_EPOCH_MS: Final = 253_402_300_799_999  # 9999-12-31T23:59:59.999Z, the last RFC 3339 instant
_EPOCH: Final = datetime(1970, 1, 1, tzinfo=UTC)
_SLUG_MAX: Final = 48
_DIGEST_HEX: Final = 16


# ---------------------------------------------------------------- settings and inputs


def _severity_table(given: Mapping[str, Severity | str]) -> Mapping[str, Severity]:
    table = dict(DEFAULT_SEVERITY)
    known = ", ".join(DEFAULT_SEVERITY)
    allowed = ", ".join(s.value for s in Severity)
    for rule, level in given.items():
        if rule not in table:
            raise ConfigError(f"severity: unknown rule {rule!r}; known rules: {known}")
        try:
            table[rule] = Severity(level)
        except ValueError:
            raise ConfigError(f"severity of {rule}: {level!r} is not one of {allowed}") from None
    return MappingProxyType(table)


def _check_prefix(prefix: object) -> None:
    if not isinstance(prefix, str) or not prefix or len(prefix) > 200:
        raise ConfigError(f"prefix must be 1-200 characters, got {prefix!r}")
    if prefix.startswith("$"):
        raise ConfigError(f"prefix must not start with '$' (reserved by brokers), got {prefix!r}")
    for level in prefix.split("/"):
        if not level or any(c in "+#" or ord(c) < 0x20 or 0x7F <= ord(c) <= 0x9F for c in level):
            raise ConfigError(
                "prefix is topic levels separated by single '/', without '+', '#' or control "
                f"characters, got {prefix!r}"
            )


@dataclass(frozen=True, slots=True)
class AlertSettings:
    """How alerts are addressed, rate-limited, cleared and graded.

    Args:
        prefix: first topic levels of the alert, status and ack topics.
        source: the CloudEvents ``source`` (a URI-reference naming this monitor).
        repeat_after_ms: while a chart stays out of control and nobody has acknowledged it, at
            most one repeated alert per this many milliseconds (0: at every signalling subgroup).
        clear_after_subgroups: consecutive subgroups without any signal that bring an
            out-of-control chart back in control.
        severity: severity by rule id (``RuleId`` values); rules left out keep
            :data:`DEFAULT_SEVERITY`.

    Examples:
        >>> AlertSettings(severity={"steady_trend": Severity.CRITICAL}).severity["steady_trend"]
        <Severity.CRITICAL: 'critical'>
        >>> AlertSettings(clear_after_subgroups=0)
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: clear_after_subgroups must be an integer of at least 1, got 0
    """

    prefix: str = "line-monitor"
    source: str = "urn:line-monitor"
    repeat_after_ms: int = 15 * 60 * 1000
    clear_after_subgroups: int = 5
    severity: Mapping[str, Severity] = field(default_factory=lambda: DEFAULT_SEVERITY, hash=False)

    def __post_init__(self) -> None:
        _check_prefix(self.prefix)
        if (
            not isinstance(self.source, str)
            or len(self.source) > 500
            or not _URI_REFERENCE_CHARS.fullmatch(self.source)
        ):
            raise ConfigError(
                "source must be a URI-reference of 1-500 characters without spaces, e.g. "
                f"'urn:line-monitor:plant-2', got {self.source!r}"
            )
        if not _is_int(self.repeat_after_ms) or self.repeat_after_ms < 0:
            raise ConfigError(
                f"repeat_after_ms must be an integer of at least 0, got {self.repeat_after_ms!r}"
            )
        if not _is_int(self.clear_after_subgroups) or self.clear_after_subgroups < 1:
            raise ConfigError(
                f"clear_after_subgroups must be an integer of at least 1, got {self.clear_after_subgroups!r}"
            )
        object.__setattr__(self, "severity", _severity_table(self.severity))


@dataclass(frozen=True, slots=True)
class SignalContext:
    """What the daemon knows about a signal beyond the core :class:`~monitor.spc.Signal`.

    Args:
        chart_id: the chart (as configured).
        hint: the configured hint for the crew ("" if none).
        limits_version: version of the limits the signal was judged against.
        subgroup_start_ms: event time of the subgroup's first reading (epoch ms), if known.
        subgroup_end_ms: event time of its last reading (epoch ms), if known.
        subgroup_size: readings (or items, or units) in the subgroup.
        p_value: chance of a signal at least this extreme while in control, if computed.
        p_value_method: how ``p_value`` was obtained.
        parent_model: the in-control distribution of single readings behind ``p_value``.
        unit: unit of the readings, shown after values in the sentence (none for CUSUM).
        name: what is measured, in the crew's words (e.g. "Tile thickness").
    """

    chart_id: str
    hint: str
    limits_version: int
    subgroup_start_ms: int | None
    subgroup_end_ms: int | None
    subgroup_size: int
    p_value: float | None
    p_value_method: str | None
    parent_model: str | None
    unit: str | None = None
    name: str | None = None

    def __post_init__(self) -> None:
        if not _is_int(self.subgroup_size) or self.subgroup_size < 1:
            raise ValueError(f"subgroup_size must be an integer of at least 1, got {self.subgroup_size!r}")
        if not _is_int(self.limits_version):
            raise ValueError(f"limits_version must be an integer, got {self.limits_version!r}")
        for key in ("subgroup_start_ms", "subgroup_end_ms"):
            value = getattr(self, key)
            if value is not None:
                _check_ms(key, value)


@dataclass(frozen=True, slots=True)
class Alert:
    """One message for people about one chart.

    Attributes:
        id: the alert id (also the CloudEvents ``id``); see :func:`alert_id`.
        chart_id: the chart.
        kind: raised, repeated or cleared.
        created_ms: when it was made (epoch ms, the ``now_ms`` of the subgroup).
        topic: where to publish it (``<prefix>/alerts/<chart>``).
        event: the CloudEvents 1.0 structured-mode JSON object.
    """

    id: str
    chart_id: str
    kind: AlertKind
    created_ms: int
    topic: str
    event: dict[str, object]

    def payload(self) -> bytes:
        """The event as UTF-8 JSON bytes (publish with content type ``application/cloudevents+json``)."""
        return orjson.dumps(self.event)


# ---------------------------------------------------------------- small helpers


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _check_ms(name: str, value: object) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not 0 <= value <= _MAX_EPOCH_MS:
        raise ValueError(f"{name} must be epoch milliseconds between 0 and {_MAX_EPOCH_MS}, got {value!r}")
    return value


def _check_chart_id(chart_id: object) -> str:
    if not isinstance(chart_id, str) or not is_chart_id(chart_id):
        raise ValueError(
            "a chart id is 1-200 characters of letters, digits, '.', '_', '-', in levels "
            f"separated by single '/', got {chart_id!r}"
        )
    return chart_id


def _rfc3339(ms: int) -> str:
    """RFC 3339 UTC with milliseconds, computed exactly from integer epoch milliseconds."""
    moment = _EPOCH + timedelta(milliseconds=ms)
    return moment.strftime("%Y-%m-%dT%H:%M:%S.") + f"{moment.microsecond // 1000:03d}Z"


def _clock(ms: int) -> str:
    return (_EPOCH + timedelta(milliseconds=ms)).strftime("%H:%M:%S")


def _finite(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _decimals(values: Sequence[float | None]) -> int | None:
    """Decimals that show every value to six significant digits (None: some need an exponent)."""
    most = 0
    for value in values:
        if value is None or not math.isfinite(value):
            continue
        text = f"{value:.6g}"
        if "e" in text:
            return None
        if "." in text:
            most = max(most, len(text.split(".")[1]))
    return most


def _number(value: float | None, unit: str | None = None, decimals: int | None = None) -> str:
    if value is None or not math.isfinite(value):
        return "unknown"
    text = f"{value:.6g}" if decimals is None else f"{value:.{decimals}f}"
    return f"{text} {unit}" if unit else text


def _optional_time(ms: int | None) -> str | None:
    return None if ms is None else _rfc3339(ms)


# ---------------------------------------------------------------- ids and topics


def alert_id(chart_id: str, subgroup_index: int, kind: AlertKind, sequence: int) -> str:
    """The id of one alert: readable parts and a short hash, the same for the same inputs.

    The readable parts (chart with '/' as '.', shortened; kind; subgroup; sequence) make ids
    unique within a chart; the hash of all four keeps them apart across charts whose shortened
    names agree. Only letters, digits, '.', '_' and '-' appear, so an id is a safe MQTT topic
    level and database key.

    Examples:
        >>> readable, digest = alert_id("press-1/thickness", 143, AlertKind.RAISED, 1).rsplit(".", 1)
        >>> readable, len(digest)
        ('press-1.thickness.raised.143.1', 16)
        >>> alert_id("press-1/thickness", 143, AlertKind.RAISED, 1) == alert_id(
        ...     "press-1/thickness", 143, AlertKind.RAISED, 1)
        True
    """
    _check_chart_id(chart_id)
    kind = AlertKind(kind)
    for name, value in (("subgroup_index", subgroup_index), ("sequence", sequence)):
        if not _is_int(value) or value < 0:
            raise ValueError(f"{name} must be an integer of at least 0, got {value!r}")
    digest = hashlib.sha256(f"{chart_id}\n{subgroup_index}\n{kind.value}\n{sequence}".encode()).hexdigest()
    slug = chart_id.replace("/", ".")[:_SLUG_MAX]
    return f"{slug}.{kind.value}.{subgroup_index}.{sequence}.{digest[:_DIGEST_HEX]}"


def topics(settings: AlertSettings, chart_id: str) -> tuple[str, str, str]:
    """The alert, status and acknowledgement topics of a chart.

    Examples:
        >>> topics(AlertSettings(prefix="plant-2/spc"), "press-1/thickness")
        ('plant-2/spc/alerts/press-1/thickness', 'plant-2/spc/status/press-1/thickness',
         'plant-2/spc/ack/press-1/thickness')
    """
    _check_chart_id(chart_id)
    base = settings.prefix
    return f"{base}/alerts/{chart_id}", f"{base}/status/{chart_id}", f"{base}/ack/{chart_id}"


# ---------------------------------------------------------------- the sentence


def _nouns(statistic: Statistic, n: int) -> tuple[str, str]:
    """(the statistic in general, the statistic of the latest subgroup) in plain words."""
    readings = f"{n} readings"
    if statistic is Statistic.MEAN and n == 1:
        return "the reading", "the latest reading"
    table = {
        Statistic.MEAN: (f"the {n}-reading average", f"the average of the last {readings}"),
        Statistic.RANGE: (
            f"the {n}-reading range (largest minus smallest)",
            f"the range (largest minus smallest) of the last {readings}",
        ),
        Statistic.SD: (
            f"the {n}-reading spread (standard deviation)",
            f"the spread (standard deviation) of the last {readings}",
        ),
        Statistic.INDIVIDUAL: ("the reading", "the latest reading"),
        Statistic.MOVING_RANGE: (
            "the jump between consecutive readings",
            "the jump between the latest readings",
        ),
        Statistic.EWMA: (
            "the smoothed average (recent readings count most)",
            "the smoothed average of recent readings",
        ),
        Statistic.CUSUM_UPPER: ("the built-up evidence of an upward shift",) * 2,
        Statistic.CUSUM_LOWER: ("the built-up evidence of a downward shift",) * 2,
        Statistic.PROPORTION: (
            "the share of nonconforming items",
            f"the share of nonconforming items among the last {n} checked",
        ),
        Statistic.RATE: (
            "the defects per unit",
            f"the defects per unit among the last {n} units checked",
        ),
    }
    return table[statistic]


def _limits(lower: str | None, upper: str | None) -> str:
    if lower is not None and upper is not None:
        return f"control limits {lower} to {upper}"
    if upper is not None:
        return f"upper control limit {upper}"
    if lower is not None:
        return f"lower control limit {lower}"
    return "no control limits"


def _pattern(signal: Signal, context: SignalContext) -> str:
    """The clause after the subject: what the rule saw, with the value and the relevant limit."""
    unit = None if signal.statistic in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER) else context.unit
    general, latest = _nouns(signal.statistic, context.subgroup_size)
    places = _decimals((signal.value, signal.center, signal.lower, signal.upper))
    v = _number(signal.value, unit, places)
    c = _number(signal.center, unit, places)
    lo = None if signal.lower is None else _number(signal.lower, unit, places)
    up = None if signal.upper is None else _number(signal.upper, unit, places)
    both = _limits(lo, up)
    high = f"upper control limit {up}" if up is not None else both
    low = f"lower control limit {lo}" if lo is not None else both
    count = len(signal.subgroups)
    span = signal.subgroup - signal.subgroups[0] + 1 if signal.subgroups else count
    rows = f"for {count} subgroups in a row"
    tail = f"the latest is {v}"
    rule, side = signal.rule, signal.side

    if rule is RuleId.BEYOND_LIMITS:
        if signal.statistic in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER):
            # CUSUM: one threshold (``upper``) for each one-sided sum.
            start = signal.run_start if signal.run_start is not None else signal.subgroups[0]
            threshold = _number(signal.upper if signal.upper is not None else signal.lower, None, places)
            direction = {Side.UPPER: "an upward", Side.LOWER: "a downward", Side.EITHER: "a lasting"}[side]
            return (
                f"the built-up evidence of {direction} shift in the average has reached {v}, past "
                f"its alarm threshold {threshold}; the shift probably began around subgroup {start}"
            )
        if side is Side.UPPER:
            return f"{latest}, {v}, is above its {high}"
        if side is Side.LOWER:
            return f"{latest}, {v}, is below its {low}"
        return f"{latest}, {v}, is outside its {both}"
    cluster = f"in {count} of the last {span} subgroups"
    if rule is RuleId.OUTER_ZONE_CLUSTER:
        if side is Side.UPPER:
            return f"{general} was unusually high {cluster}, near or above the {high}; {tail}"
        if side is Side.LOWER:
            return f"{general} was unusually low {cluster}, near or below the {low}; {tail}"
        return f"{general} was unusually far from the center line {c} {cluster} ({both}); {tail}"
    if rule is RuleId.MIDDLE_ZONE_CLUSTER:
        if side is Side.UPPER:
            return f"{general} was clearly above the center line {c} {cluster} ({high}); {tail}"
        if side is Side.LOWER:
            return f"{general} was clearly below the center line {c} {cluster} ({low}); {tail}"
        return f"{general} was clearly away from the center line {c} {cluster} ({both}); {tail}"
    if rule is RuleId.SAME_SIDE_RUN:
        if side is Side.UPPER:
            return f"{general} has been above the center line {c} {rows} ({high}); {tail}"
        if side is Side.LOWER:
            return f"{general} has been below the center line {c} {rows} ({low}); {tail}"
        return f"{general} has stayed on one side of the center line {c} {rows} ({both}); {tail}"
    if rule is RuleId.STEADY_TREND:
        if side is Side.UPPER:
            return f"{general} has been steadily rising {rows} ({high}); {tail}"
        if side is Side.LOWER:
            return f"{general} has been steadily falling {rows} ({low}); {tail}"
        return f"{general} has moved steadily in one direction {rows} ({both}); {tail}"
    # The three patterns without a direction; a side, if a chart ever gives one, is reported.
    lean = {Side.UPPER: ", on the high side", Side.LOWER: ", on the low side", Side.EITHER: ""}[side]
    limits = {Side.UPPER: high, Side.LOWER: low, Side.EITHER: both}[side]
    if rule is RuleId.ALTERNATING_RUN:
        return (
            f"{general} has alternated up and down {rows}{lean} (center line {c}, {limits}), as "
            f"when two sources such as machines or gauges take turns; {tail}"
        )
    if rule is RuleId.HUGGING_CENTER:
        return (
            f"{general} has stayed unusually close to the center line {c} {rows}{lean} ({limits}), "
            f"with less variation than the limits expect, as when they are out of date or readings "
            f"are rounded; {tail}"
        )
    spread = " on both sides" if side is Side.EITHER else ""
    return (
        f"{general} has kept away from the center line {c}{spread} {rows}{lean} ({limits}), as "
        f"when two different processes are mixed; {tail}"
    )


def _who(chart_id: str, name: str | None) -> str:
    return f"{name} on {chart_id}" if name else f"Chart {chart_id}"


def describe(signal: Signal, context: SignalContext) -> str:
    """One plain sentence about a signal, for the crew: what, how far, against which limit, when.

    The hint and the advisory caution are kept out of the sentence (they are fields of their
    own in the alert).

    Examples:
        >>> from monitor.spc import ChartKind, RuleId, Side, Signal, Statistic
        >>> context = SignalContext(chart_id="press-1/thickness", hint="", limits_version=1,
        ...     subgroup_start_ms=None, subgroup_end_ms=1_772_000_000_000, subgroup_size=5,
        ...     p_value=None, p_value_method=None, parent_model=None, unit="mm")
        >>> trend = Signal(ChartKind.XBAR_R, Statistic.MEAN, RuleId.STEADY_TREND, Side.UPPER,
        ...                148, tuple(range(143, 149)), 8.03, 8.0, 7.946, 8.054)
        >>> print(describe(trend, context))
        Chart press-1/thickness: the 5-reading average has been steadily rising for 6 subgroups
        in a row (upper control limit 8.054 mm); the latest is 8.030 mm (subgroup 148, 06:13:20 UTC).
    """
    when = context.subgroup_end_ms if context.subgroup_end_ms is not None else context.subgroup_start_ms
    place = f"subgroup {signal.subgroup}" + ("" if when is None else f", {_clock(when)} UTC")
    return f"{_who(context.chart_id, context.name)}: {_pattern(signal, context)} ({place})."


_HEADLINES: Final = {
    RuleId.BEYOND_LIMITS: "outside its control limits",
    RuleId.OUTER_ZONE_CLUSTER: "unusually far from its center line",
    RuleId.MIDDLE_ZONE_CLUSTER: "clearly off its center line",
    RuleId.SAME_SIDE_RUN: "a long run on one side of its center line",
    RuleId.STEADY_TREND: "a steady trend",
    RuleId.ALTERNATING_RUN: "alternating up and down",
    RuleId.HUGGING_CENTER: "unusually little variation",
    RuleId.AVOIDING_CENTER: "keeping away from its center line",
}


# ---------------------------------------------------------------- acknowledgements


class AckError(MonitorError, ValueError):
    """An acknowledgement message cannot be used; ``reason`` says why (safe to log)."""

    def __init__(self, reason: str, chart_id: str = "") -> None:
        self.reason = reason
        self.chart_id = chart_id
        where = f" for chart {chart_id!r}" if chart_id else ""
        super().__init__(f"acknowledgement{where} refused: {reason}")


@dataclass(frozen=True, slots=True)
class AckRequest:
    """A crew's acknowledgement of an alert, as read by :func:`parse_ack`."""

    chart_id: str
    alert_id: str
    by: str
    note: str | None = None


ACK_MAX_BYTES: Final = 4096
_ACK_FIELDS: Final = frozenset({"alert_id", "by", "note"})


def _no_duplicate_keys(pairs: list[tuple[str, object]]) -> dict[str, object]:
    out: dict[str, object] = {}
    for key, value in pairs:
        if key in out:
            raise AckError(f"field {key!r} appears twice")
        out[key] = value
    return out


def _refuse_constant(name: str) -> object:
    raise AckError(f"{name} is not a JSON number")


def _bad_character(text: str, allow_lines: bool) -> str | None:
    for c in text:
        code = ord(c)
        if 0xD800 <= code <= 0xDFFF:
            return "an unpaired surrogate"
        if (code < 0x20 and not (allow_lines and c in "\n\r\t")) or 0x7F <= code <= 0x9F:
            return f"the control character U+{code:04X}"
    return None


def _text_field(message: dict[str, object], key: str, low: int, high: int, allow_lines: bool) -> str:
    value = message[key]
    if not isinstance(value, str):
        raise AckError(f"{key!r} must be a string, got {type(value).__name__}")
    if not low <= len(value) <= high:
        raise AckError(f"{key!r} must be {low} to {high} characters, got {len(value)}")
    bad = _bad_character(value, allow_lines)
    if bad is not None:
        raise AckError(f"{key!r} contains {bad}")
    return value


def parse_ack(payload: bytes, chart_id: str) -> AckRequest:
    """Read an acknowledgement sent on ``<prefix>/ack/<chart>``.

    The payload is a UTF-8 JSON object of at most 4 KiB with exactly the fields ``alert_id``
    (1-200 characters), ``by`` (1-100 characters, not blank) and optionally ``note`` (at most
    1000 characters); anything else raises :class:`AckError` with the reason.

    Examples:
        >>> parse_ack(b'{"alert_id": "a.raised.1.1.x", "by": "J. Doe"}', "press-1/thickness")
        AckRequest(chart_id='press-1/thickness', alert_id='a.raised.1.1.x', by='J. Doe', note=None)
        >>> parse_ack(b'{"alert_id": "x", "by": "J. Doe", "priority": 1}', "press-1/thickness")
        Traceback (most recent call last):
        ...
        monitor.alerts.AckError: acknowledgement for chart 'press-1/thickness' refused:
        unexpected field(s): priority
    """
    try:
        return _parse_ack(payload, chart_id)
    except AckError as exc:
        raise AckError(exc.reason, chart_id) from None


def _parse_ack(payload: bytes, chart_id: str) -> AckRequest:
    if not isinstance(payload, bytes | bytearray):
        raise AckError(f"payload must be bytes, got {type(payload).__name__}")
    if len(payload) > ACK_MAX_BYTES:
        raise AckError(f"payload is {len(payload)} bytes; at most {ACK_MAX_BYTES} are accepted")
    try:
        text = bytes(payload).decode("utf-8")
    except UnicodeDecodeError:
        raise AckError("payload is not valid UTF-8") from None
    try:
        message = json.loads(text, object_pairs_hook=_no_duplicate_keys, parse_constant=_refuse_constant)
    except json.JSONDecodeError as exc:
        raise AckError(f"payload is not JSON ({exc.msg} at character {exc.pos})") from None
    except RecursionError:
        raise AckError("payload is nested too deeply") from None
    if not isinstance(message, dict):
        raise AckError(f"payload must be a JSON object, got {type(message).__name__}")
    extra = sorted(set(message) - _ACK_FIELDS)
    if extra:
        raise AckError(f"unexpected field(s): {', '.join(extra)}")
    missing = [key for key in ("alert_id", "by") if key not in message]
    if missing:
        raise AckError(f"missing field(s): {', '.join(missing)}")
    ident = _text_field(message, "alert_id", 1, 200, allow_lines=False)
    by = _text_field(message, "by", 1, 100, allow_lines=False)
    if not by.strip():
        raise AckError("'by' must name who acknowledges, got only spaces")
    note = None
    if "note" in message and message["note"] is not None:
        note = _text_field(message, "note", 0, 1000, allow_lines=True)
    return AckRequest(chart_id, ident, by, note)


# ---------------------------------------------------------------- the tracker

_T = TypeVar("_T")

_KIND: Final = "alert_tracker"
_SCHEMA: Final = 1


def _signal_summary(signal: Signal, context: SignalContext, severity: Severity) -> dict[str, object]:
    """One signal as JSON for ``other_signals`` and the status message."""
    return {
        "rule": signal.rule.value,
        "side": signal.side.value,
        "severity": severity.value,
        "chart_kind": signal.chart.value,
        "statistic": signal.statistic.value,
        "value": _finite(signal.value),
        "center": _finite(signal.center),
        "lower": _finite(signal.lower),
        "upper": _finite(signal.upper),
        "p_value": _finite(context.p_value),
        "p_value_method": context.p_value_method,
        "subgroup": signal.subgroup,
        "message": describe(signal, context),
    }


class AlertTracker:
    """The alert state of one chart: a pure state machine fed once per charted subgroup.

    Args:
        chart_id: the chart.
        settings: topics, source, repeat interval, quiet subgroups to clear, severities.
        collecting_baseline: start in ``collecting_baseline`` (the chart has no limits yet).

    States: ``collecting_baseline`` → ``in_control`` ⇄ ``out_of_control``. Going out of control
    raises an alert; staying out of control repeats it at most once per ``repeat_after_ms``
    and never after an acknowledgement; ``clear_after_subgroups`` quiet subgroups in a row
    clear it. Every alert gets the next number of the chart's sequence, so ids never repeat
    within a chart.
    """

    __slots__ = (
        "_ack_at_ms",
        "_ack_by",
        "_ack_note",
        "_active_id",
        "_chart_id",
        "_last_alert_ms",
        "_last_index",
        "_last_signal",
        "_latest_id",
        "_name",
        "_quiet",
        "_sequence",
        "_settings",
        "_severity",
        "_since_ms",
        "_state",
        "_suppressed",
        "_topics",
    )

    def __init__(self, chart_id: str, settings: AlertSettings, *, collecting_baseline: bool = False) -> None:
        self._chart_id = _check_chart_id(chart_id)
        self._settings = settings
        self._topics = topics(settings, chart_id)
        self._state = ChartState.COLLECTING_BASELINE if collecting_baseline else ChartState.IN_CONTROL
        self._since_ms: int | None = None
        self._sequence = 0
        self._last_index: int | None = None
        self._name: str | None = None
        self._clear_episode()

    def _clear_episode(self) -> None:
        self._active_id: str | None = None
        self._latest_id: str | None = None
        self._severity: Severity | None = None
        self._last_alert_ms: int | None = None
        self._ack_by: str | None = None
        self._ack_at_ms: int | None = None
        self._ack_note: str | None = None
        self._quiet = 0
        self._suppressed = 0
        self._last_signal: dict[str, object] | None = None

    def __repr__(self) -> str:
        """Chart, state and active alert."""
        return (
            f"AlertTracker(chart_id={self._chart_id!r}, state={self._state.value!r}, "
            f"active={self._active_id!r})"
        )

    # ------------------------------------------------------------ views

    @property
    def chart_id(self) -> str:
        """The chart this tracker follows."""
        return self._chart_id

    @property
    def state(self) -> ChartState:
        """The chart's state as alerting sees it."""
        return self._state

    @property
    def active_alert_id(self) -> str | None:
        """Id of the raised alert of the current out-of-control episode (None when in control)."""
        return self._active_id

    @property
    def acknowledged(self) -> bool:
        """Whether someone has acknowledged the active alert."""
        return self._ack_by is not None

    # ------------------------------------------------------------ feeding

    def observe(
        self,
        signals: Sequence[Signal],
        contexts: Sequence[SignalContext],
        *,
        subgroup_index: int,
        now_ms: int,
        collecting_baseline: bool = False,
    ) -> list[Alert]:
        """Take the signals of one charted subgroup (often none); return the alerts to publish.

        Args:
            signals: this subgroup's signals, from every chart kind of the chart.
            contexts: one context per signal, in the same order.
            subgroup_index: the subgroup's index; strictly increasing from call to call.
            now_ms: the time to stamp on alerts (epoch ms).
            collecting_baseline: the chart is still collecting its baseline (then there can be
                no signals, and no alert may be open).

        Returns:
            At most one alert.

        Raises:
            ValueError: mismatched signals and contexts, a context or signal of another chart
                or subgroup, an index that does not increase, or a bad time.
        """
        _check_ms("now_ms", now_ms)
        if not _is_int(subgroup_index):
            raise ValueError(f"subgroup_index must be an integer, got {subgroup_index!r}")
        if self._last_index is not None and subgroup_index <= self._last_index:
            raise ValueError(
                f"chart {self._chart_id!r}: subgroup {subgroup_index} does not follow subgroup "
                f"{self._last_index}; restore the tracker from the snapshot matching the chart"
            )
        if len(signals) != len(contexts):
            raise ValueError(f"got {len(signals)} signals but {len(contexts)} contexts; give one per signal")
        for signal, context in zip(signals, contexts, strict=True):
            if context.chart_id != self._chart_id:
                raise ValueError(f"a context of chart {context.chart_id!r} reached chart {self._chart_id!r}")
            if signal.subgroup != subgroup_index:
                raise ValueError(
                    f"a signal of subgroup {signal.subgroup} came with subgroup {subgroup_index}"
                )
        if collecting_baseline:
            if signals:
                raise ValueError("a chart collecting its baseline has no limits, so it cannot signal")
            if self._state is ChartState.OUT_OF_CONTROL:
                raise ValueError(
                    f"chart {self._chart_id!r} is out of control with alert {self._active_id}; "
                    "it cannot go back to collecting a baseline"
                )
        self._last_index = subgroup_index
        if self._since_ms is None:
            self._since_ms = now_ms
        if collecting_baseline:
            self._enter(ChartState.COLLECTING_BASELINE, now_ms)
            return []
        if self._state is ChartState.COLLECTING_BASELINE:
            self._enter(ChartState.IN_CONTROL, now_ms)
        for context in contexts:
            self._name = context.name or self._name

        if not signals:
            if self._state is not ChartState.OUT_OF_CONTROL:
                return []
            self._quiet += 1
            if self._quiet < self._settings.clear_after_subgroups:
                return []
            return [self._cleared(subgroup_index, now_ms)]

        ranked = sorted(
            zip(signals, contexts, strict=True),
            key=lambda pair: -_RANK[self._settings.severity[pair[0].rule.value]],
        )
        lead, lead_context = ranked[0]
        lead_severity = self._settings.severity[lead.rule.value]
        self._last_signal = _signal_summary(lead, lead_context, lead_severity) | {"at": _rfc3339(now_ms)}
        self._quiet = 0
        if self._state is ChartState.IN_CONTROL:
            self._enter(ChartState.OUT_OF_CONTROL, now_ms)
            self._severity = lead_severity
            alert = self._alert(AlertKind.RAISED, subgroup_index, now_ms, ranked)
            self._active_id = alert.id
            return [alert]
        # Out of control already: the episode's severity is the highest seen (the status shows
        # it even while alerts are held back); repeat only when due and nobody has acknowledged.
        if self._severity is None or _RANK[lead_severity] > _RANK[self._severity]:
            self._severity = lead_severity
        due = self._last_alert_ms is None or now_ms - self._last_alert_ms >= self._settings.repeat_after_ms
        if self.acknowledged or not due:
            self._suppressed += len(signals)
            return []
        return [self._alert(AlertKind.REPEATED, subgroup_index, now_ms, ranked)]

    def observe_quiet(self, first_index: int, last_index: int, *, now_ms: int) -> list[Alert]:
        """:meth:`observe` for a stretch of charted subgroups without signals, in one call.

        The same alerts and state as ``observe([], [], subgroup_index=i, now_ms=now_ms)`` for
        each ``i`` from ``first_index`` to ``last_index``; only an open episode is walked
        subgroup by subgroup (at most ``clear_after_subgroups`` of them).
        """
        if not (_is_int(first_index) and _is_int(last_index)):
            raise ValueError(f"subgroup indices must be integers, got {first_index!r} and {last_index!r}")
        if last_index < first_index:
            return []
        if self._last_index is not None and first_index <= self._last_index:
            raise ValueError(
                f"chart {self._chart_id!r}: subgroup {first_index} does not follow "
                f"subgroup {self._last_index}"
            )
        alerts: list[Alert] = []
        index = first_index
        while index <= last_index and self._state is ChartState.OUT_OF_CONTROL:
            alerts += self.observe([], [], subgroup_index=index, now_ms=now_ms)
            index += 1
        if index <= last_index:  # nothing open: a quiet subgroup only moves the index on
            alerts += self.observe([], [], subgroup_index=last_index, now_ms=now_ms)
        return alerts

    def _enter(self, state: ChartState, now_ms: int) -> None:
        if state is not self._state:
            self._state = state
            self._since_ms = now_ms

    def _next_id(self, kind: AlertKind, subgroup_index: int) -> str:
        self._sequence += 1
        return alert_id(self._chart_id, subgroup_index, kind, self._sequence)

    def _envelope(self, ident: str, kind: AlertKind, now_ms: int, data: dict[str, object]) -> Alert:
        severity = data["severity"]
        event: dict[str, object] = {
            "specversion": "1.0",
            "id": ident,
            "source": self._settings.source,
            "type": EVENT_TYPES[kind],
            "subject": self._chart_id,
            "time": _rfc3339(now_ms),
            "datacontenttype": "application/json",
            "severity": severity,
            "data": data,
        }
        return Alert(ident, self._chart_id, kind, now_ms, self._topics[0], event)

    def _alert(
        self,
        kind: AlertKind,
        subgroup_index: int,
        now_ms: int,
        ranked: Sequence[tuple[Signal, SignalContext]],
    ) -> Alert:
        ident = self._next_id(kind, subgroup_index)
        lead, context = ranked[0]
        severity = self._settings.severity[lead.rule.value]
        suppressed = self._suppressed if kind is AlertKind.REPEATED else 0
        raised_id = ident if kind is AlertKind.RAISED else self._active_id
        message = describe(lead, context)
        who = _who(self._chart_id, self._name)
        if kind is AlertKind.RAISED:
            headline = f"{who} is out of control: {_HEADLINES[lead.rule]} ({severity.value})"
        else:
            since = _clock(self._since_ms) if self._since_ms is not None else "earlier"
            more = f"{suppressed} more signal{'s' if suppressed != 1 else ''} since the last alert"
            headline = (
                f"{who} is still out of control since {since} UTC, {more}, not yet acknowledged: "
                f"{_HEADLINES[lead.rule]} ({severity.value})"
            )
        data: dict[str, object] = {
            "chart": self._chart_id,
            "state": ChartState.OUT_OF_CONTROL.value,
            "kind": kind.value,
            "severity": severity.value,
            "headline": headline,
            "message": message,
            "hint": context.hint or None,
            "advisory": ADVISORY,
            "rule": lead.rule.value,
            "side": lead.side.value,
            "chart_kind": lead.chart.value,
            "statistic": lead.statistic.value,
            "value": _finite(lead.value),
            "center": _finite(lead.center),
            "lower": _finite(lead.lower),
            "upper": _finite(lead.upper),
            "unit": context.unit,
            "p_value": _finite(context.p_value),
            "p_value_method": context.p_value_method,
            "parent_model": context.parent_model,
            "limits_version": context.limits_version,
            "subgroup": {
                "index": subgroup_index,
                "start": _optional_time(context.subgroup_start_ms),
                "end": _optional_time(context.subgroup_end_ms),
                "size": context.subgroup_size,
            },
            "pattern_subgroups": list(lead.subgroups),
            "shift_start_subgroup": lead.run_start,
            "other_signals": [
                _signal_summary(s, c, self._settings.severity[s.rule.value]) for s, c in ranked[1:]
            ],
            "suppressed_signals": suppressed,
            "out_of_control_since": _optional_time(self._since_ms),
            "raised_alert_id": raised_id,
            "acknowledged": False,
            "acknowledged_by": None,
            "acknowledged_at": None,
            "acknowledge": {"topic": self._topics[2], "alert_id": raised_id},
        }
        self._latest_id = ident
        self._last_alert_ms = now_ms
        self._suppressed = 0
        return self._envelope(ident, kind, now_ms, data)

    def _cleared(self, subgroup_index: int, now_ms: int) -> Alert:
        ident = self._next_id(AlertKind.CLEARED, subgroup_index)
        quiet = self._quiet
        closed = self._active_id
        who = _who(self._chart_id, self._name)
        message = (
            f"{who} is back in control: no rule has signalled for {quiet} subgroup"
            f"{'s' if quiet != 1 else ''} in a row (subgroup {subgroup_index}, {_clock(now_ms)} UTC); "
            f"this closes alert {closed}."
        )
        data: dict[str, object] = {
            "chart": self._chart_id,
            "state": ChartState.IN_CONTROL.value,
            "kind": AlertKind.CLEARED.value,
            "severity": Severity.INFO.value,
            "headline": f"{who} is back in control",
            "message": message,
            "hint": None,
            "advisory": ADVISORY,
            "rule": None,
            "side": None,
            "chart_kind": None,
            "statistic": None,
            "value": None,
            "center": None,
            "lower": None,
            "upper": None,
            "unit": None,
            "p_value": None,
            "p_value_method": None,
            "parent_model": None,
            "limits_version": None,
            "subgroup": {"index": subgroup_index, "start": None, "end": None, "size": None},
            "pattern_subgroups": [],
            "shift_start_subgroup": None,
            "other_signals": [],
            "suppressed_signals": self._suppressed,
            "out_of_control_since": _optional_time(self._since_ms),
            "raised_alert_id": closed,
            "acknowledged": self.acknowledged,
            "acknowledged_by": self._ack_by,
            "acknowledged_at": _optional_time(self._ack_at_ms),
            "acknowledge": None,
        }
        alert = self._envelope(ident, AlertKind.CLEARED, now_ms, data)
        self._enter(ChartState.IN_CONTROL, now_ms)
        self._clear_episode()
        return alert

    # ------------------------------------------------------------ acknowledging

    def acknowledge(self, alert_id: str, by: str, at_ms: int, *, note: str | None = None) -> bool:
        """Record that someone has seen the active alert; no repeats follow until it clears.

        ``alert_id`` may be the raised alert of the current episode or its latest repeat. An
        acknowledgement that arrives again (same or other person) keeps the first one.

        Returns:
            True if ``alert_id`` belongs to the current episode; False for any other id (an old
            episode, another chart, a typo) or when the chart is in control.
        """
        _check_ms("at_ms", at_ms)
        if not isinstance(by, str) or not by.strip():
            raise ValueError(f"an acknowledgement must name who gives it, got {by!r}")
        if self._active_id is None or alert_id not in (self._active_id, self._latest_id):
            return False
        if self._ack_by is None:
            self._ack_by = by
            self._ack_at_ms = at_ms
            self._ack_note = note
        return True

    # ------------------------------------------------------------ status

    def status(self, now_ms: int) -> dict[str, object]:
        """The body of the retained ``<prefix>/status/<chart>`` message."""
        _check_ms("now_ms", now_ms)
        who = _who(self._chart_id, self._name)
        since = "" if self._since_ms is None else f" since {_rfc3339(self._since_ms)}"
        if self._state is ChartState.OUT_OF_CONTROL:
            severity = self._severity.value if self._severity is not None else "unknown"
            ack = f"acknowledged by {self._ack_by}" if self._ack_by is not None else "not yet acknowledged"
            summary = f"{who} is out of control{since} ({severity}), {ack}."
        elif self._state is ChartState.COLLECTING_BASELINE:
            summary = f"{who} is collecting its baseline{since}; no limits yet, so no alerts."
        else:
            summary = f"{who} is in control{since}."
        return {
            "chart": self._chart_id,
            "state": self._state.value,
            "since": _optional_time(self._since_ms),
            "summary": summary,
            "active_alert_id": self._active_id,
            "latest_alert_id": self._latest_id,
            "severity": None if self._severity is None else self._severity.value,
            "acknowledged": self.acknowledged,
            "acknowledged_by": self._ack_by,
            "acknowledged_at": _optional_time(self._ack_at_ms),
            "acknowledgement_note": self._ack_note,
            "suppressed_signals": self._suppressed,
            "quiet_subgroups": self._quiet,
            "clear_after_subgroups": self._settings.clear_after_subgroups,
            "last_subgroup": self._last_index,
            "last_signal": None if self._last_signal is None else dict(self._last_signal),
            "ack_topic": self._topics[2],
            "advisory": ADVISORY,
            "updated": _rfc3339(now_ms),
        }

    # ------------------------------------------------------------ snapshots

    def to_state(self) -> dict[str, object]:
        """The tracker as plain JSON-able data (settings are not included: they come from config)."""
        return {
            "kind": _KIND,
            "schema": _SCHEMA,
            "chart": self._chart_id,
            "state": self._state.value,
            "since_ms": self._since_ms,
            "sequence": self._sequence,
            "last_index": self._last_index,
            "name": self._name,
            "active_id": self._active_id,
            "latest_id": self._latest_id,
            "severity": None if self._severity is None else self._severity.value,
            "last_alert_ms": self._last_alert_ms,
            "ack_by": self._ack_by,
            "ack_at_ms": self._ack_at_ms,
            "ack_note": self._ack_note,
            "quiet": self._quiet,
            "suppressed": self._suppressed,
            "last_signal": None if self._last_signal is None else dict(self._last_signal),
        }

    @classmethod
    def from_state(cls, chart_id: str, settings: AlertSettings, state: Mapping[str, object]) -> Self:
        """Rebuild a tracker from :meth:`to_state`; continuing equals never having stopped.

        Raises:
            StateError: a snapshot of another kind or chart, of a newer schema, or malformed.
        """
        if state.get("kind") != _KIND:
            raise StateError(f"snapshot is of kind {state.get('kind')!r}, expected {_KIND!r}")
        schema = _get(state, "schema", int)
        if schema > _SCHEMA:
            raise StateError(
                f"snapshot of kind {_KIND!r} has schema {schema}; this version reads up to {_SCHEMA}; "
                "upgrade the monitor or discard the snapshot"
            )
        if state.get("chart") != chart_id:
            raise StateError(f"snapshot is of chart {state.get('chart')!r}, not {chart_id!r}")
        tracker = cls(chart_id, settings)
        try:
            tracker._state = ChartState(_get(state, "state", str))
            severity = _get_optional(state, "severity", str)
            tracker._severity = None if severity is None else Severity(severity)
        except ValueError as exc:
            raise StateError(f"snapshot of chart {chart_id!r}: {exc}") from None
        tracker._since_ms = _get_optional(state, "since_ms", int)
        tracker._sequence = _get(state, "sequence", int)
        tracker._last_index = _get_optional(state, "last_index", int)
        tracker._name = _get_optional(state, "name", str)
        tracker._active_id = _get_optional(state, "active_id", str)
        tracker._latest_id = _get_optional(state, "latest_id", str)
        tracker._last_alert_ms = _get_optional(state, "last_alert_ms", int)
        tracker._ack_by = _get_optional(state, "ack_by", str)
        tracker._ack_at_ms = _get_optional(state, "ack_at_ms", int)
        tracker._ack_note = _get_optional(state, "ack_note", str)
        tracker._quiet = _get(state, "quiet", int)
        tracker._suppressed = _get(state, "suppressed", int)
        last = _get_optional(state, "last_signal", dict)
        tracker._last_signal = None if last is None else {str(k): v for k, v in last.items()}
        if (tracker._state is ChartState.OUT_OF_CONTROL) != (tracker._active_id is not None):
            raise StateError(
                f"snapshot of chart {chart_id!r} is inconsistent: state {tracker._state.value} "
                f"with active alert {tracker._active_id!r}"
            )
        return tracker


def _get(state: Mapping[str, object], key: str, kind: type[_T]) -> _T:
    value = state.get(key)
    if not isinstance(value, kind) or isinstance(value, bool):
        raise StateError(f"snapshot field {key!r} must be {kind.__name__}, got {value!r}")
    return value


def _get_optional(state: Mapping[str, object], key: str, kind: type[_T]) -> _T | None:
    if state.get(key) is None:
        return None
    return _get(state, key, kind)
