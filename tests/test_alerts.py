"""Alerts: the per-chart state machine, its ids, its CloudEvents envelope, its sentences, acks.

Every produced event is checked by a validator written here from the CloudEvents 1.0
specification (github.com/cloudevents/spec, ``cloudevents/spec.md``: context attributes, naming
conventions, type system; ``cloudevents/formats/json-format.md``: the JSON envelope and the
handling of ``data``), not by the module's own code. URI-references follow RFC 3986 (sections
3.1, 4.1, 4.2), timestamps RFC 3339 (section 5.6), media types RFC 2045 (section 5.1) and
RFC 2046.
"""

from __future__ import annotations

import copy
import json
import math
import re
import subprocess
import sys
import time
from dataclasses import replace
from datetime import UTC, datetime

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.alerts import (
    ADVISORY,
    DEFAULT_SEVERITY,
    AckError,
    AckRequest,
    Alert,
    AlertKind,
    AlertSettings,
    AlertTracker,
    ChartState,
    Severity,
    SignalContext,
    alert_id,
    describe,
    parse_ack,
    topics,
)
from monitor.cli import ADVISORY as CLI_ADVISORY
from monitor.spc import ChartKind, ConfigError, RuleId, Side, Signal, StateError, Statistic

CHART = "press-1/thickness"
T0 = 1_772_000_000_000  # 2026-02-25T06:13:20Z
MINUTE = 60_000
SETTINGS = AlertSettings(repeat_after_ms=15 * MINUTE, clear_after_subgroups=3)

DIRECTED = (
    RuleId.BEYOND_LIMITS,
    RuleId.OUTER_ZONE_CLUSTER,
    RuleId.MIDDLE_ZONE_CLUSTER,
    RuleId.SAME_SIDE_RUN,
    RuleId.STEADY_TREND,
)


def make_signal(
    rule: RuleId = RuleId.BEYOND_LIMITS,
    subgroup: int = 10,
    side: Side | None = None,
    value: float = 8.061,
    statistic: Statistic = Statistic.MEAN,
    chart: ChartKind = ChartKind.XBAR_R,
) -> Signal:
    if side is None:
        side = Side.UPPER if rule in DIRECTED else Side.EITHER
    span = 1 if rule is RuleId.BEYOND_LIMITS else 8
    return Signal(
        chart=chart,
        statistic=statistic,
        rule=rule,
        side=side,
        subgroup=subgroup,
        subgroups=tuple(range(subgroup - span + 1, subgroup + 1)),
        value=value,
        center=8.0,
        lower=7.946,
        upper=8.054,
        z=3.4,
    )


def make_context(chart_id: str = CHART, **changes: object) -> SignalContext:
    context = SignalContext(
        chart_id=chart_id,
        hint="Check the die inserts of press 1 for wear.",
        limits_version=3,
        subgroup_start_ms=T0 - 5_000,
        subgroup_end_ms=T0,
        subgroup_size=5,
        p_value=0.00042,
        p_value_method="closed_form",
        parent_model="normal",
        unit="mm",
        name="Tile thickness",
    )
    return replace(context, **changes)


# ---------------------------------------------------------------- a CloudEvents 1.0 validator

_NAME = re.compile(r"[a-z0-9]+")  # spec.md, "Naming Conventions"
_INT32 = (-(2**31), 2**31 - 1)  # spec.md, "Type System": Integer
# RFC 3339, section 5.6 (date-time), with the "T"/"Z" letters case-insensitive as its note allows.
_RFC3339 = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})[Tt](\d{2}):(\d{2}):(\d{2})(\.\d+)?([Zz]|[+-]\d{2}:\d{2})",
)
# RFC 3986: pct-encoded / unreserved / gen-delims / sub-delims (sections 2.1-2.3).
_URI_CHARS = re.compile(r"(?:%[0-9A-Fa-f]{2}|[A-Za-z0-9\-._~:/?#\[\]@!$&'()*+,;=])*")
_SCHEME = re.compile(r"[A-Za-z][A-Za-z0-9+\-.]*")  # RFC 3986, section 3.1
# RFC 2045, section 5.1: token := 1*<any (US-ASCII) CHAR except SPACE, CTLs, or tspecials>
_MEDIA_WORD = r"[!#$%&'*+\-.0-9A-Z^_`a-z{|}~]+"
_MEDIA_TYPE = re.compile(
    rf"({_MEDIA_WORD})/({_MEDIA_WORD})(?:\s*;\s*{_MEDIA_WORD}=(?:{_MEDIA_WORD}|\"(?:[^\"\\\r]|\\.)*\"))*",
)


def _string_problem(text: str) -> str | None:
    """spec.md, "Type System", String: the characters a CloudEvents string must not contain."""
    for i, char in enumerate(text):
        code = ord(char)
        if code <= 0x1F or 0x7F <= code <= 0x9F:
            return f"control character U+{code:04X}"
        if 0xFDD0 <= code <= 0xFDEF or (code & 0xFFFE) == 0xFFFE:
            return f"noncharacter U+{code:04X}"
        if 0xD800 <= code <= 0xDFFF:
            # Python strings hold code points; a surrogate here is always unpaired.
            return f"unpaired surrogate U+{code:04X} at {i}"
    return None


def _uri_reference_problem(text: str) -> str | None:
    """RFC 3986, 4.1: URI-reference = URI / relative-ref (4.2: no ':' in a first relative segment)."""
    if not _URI_CHARS.fullmatch(text):
        return "characters outside RFC 3986"
    if text.count("#") > 1:
        return "more than one '#'"
    head = re.split(r"[/?#]", text, maxsplit=1)[0]
    if ":" in head:
        scheme = head.split(":", 1)[0]
        if not _SCHEME.fullmatch(scheme):
            return f"bad scheme {scheme!r}"
    return None


def _timestamp_problem(text: str) -> str | None:
    match = _RFC3339.fullmatch(text)
    if match is None:
        return "not an RFC 3339 date-time"
    year, month, day, hour, minute, second = (int(match.group(i)) for i in range(1, 7))
    try:
        datetime(year, month, day, hour, minute, min(second, 59), tzinfo=UTC)  # 60: leap second, allowed
    except ValueError as exc:
        return f"not a calendar date-time ({exc})"
    if second > 60:
        return "seconds above 60"
    return None


def cloudevents_problems(event: object) -> list[str]:
    """Every way ``event`` breaks the CloudEvents 1.0 JSON format (empty list: none)."""
    if not isinstance(event, dict):
        return ["a structured-mode event is a JSON object"]
    problems: list[str] = []
    try:
        text = json.dumps(event, allow_nan=False)
    except (TypeError, ValueError) as exc:
        return [f"not strict JSON: {exc}"]
    if json.loads(text) != event:
        problems.append("does not survive a JSON round trip unchanged")
    # A member with value null is an unset attribute (json-format.md, 2.2).
    attributes = {k: v for k, v in event.items() if k not in ("data", "data_base64") and v is not None}
    if "data" in event and "data_base64" in event:
        problems.append("'data' and 'data_base64' are mutually exclusive (json-format.md, 3.1.1)")
    for name, value in attributes.items():
        if not _NAME.fullmatch(name):
            problems.append(f"attribute name {name!r} is not lower-case ASCII letters and digits")
        if isinstance(value, bool):
            continue
        if isinstance(value, int):
            if not _INT32[0] <= value <= _INT32[1]:
                problems.append(f"attribute {name!r}: integer out of the 32-bit range")
            continue
        if not isinstance(value, str):
            problems.append(f"attribute {name!r}: {type(value).__name__} is not a CloudEvents type")
            continue
        bad = _string_problem(value)
        if bad:
            problems.append(f"attribute {name!r}: {bad}")
    for required in ("id", "source", "specversion", "type"):
        value = attributes.get(required)
        if not isinstance(value, str) or not value:
            problems.append(f"required attribute {required!r} must be a non-empty string")
    if attributes.get("specversion") not in (None, "1.0"):
        problems.append("specversion must be '1.0' for this version of the specification")
    source = attributes.get("source")
    if isinstance(source, str) and source:
        bad = _uri_reference_problem(source)
        if bad:
            problems.append(f"source is not a URI-reference: {bad}")
    for optional in ("subject", "datacontenttype", "dataschema", "time"):
        if optional in attributes and (not isinstance(attributes[optional], str) or not attributes[optional]):
            problems.append(f"optional attribute {optional!r}, if present, must be a non-empty string")
    time_value = attributes.get("time")
    if isinstance(time_value, str) and time_value:
        bad = _timestamp_problem(time_value)
        if bad:
            problems.append(f"time: {bad}")
    content_type = attributes.get("datacontenttype")
    if isinstance(content_type, str) and content_type:
        match = _MEDIA_TYPE.fullmatch(content_type)
        if match is None:
            problems.append(f"datacontenttype {content_type!r} is not an RFC 2046 media type")
    schema = attributes.get("dataschema")
    if isinstance(schema, str) and schema:
        bad = _uri_reference_problem(schema)
        head = re.split(r"[/?#]", schema, maxsplit=1)[0]
        if bad or ":" not in head:
            problems.append("dataschema must be an absolute URI")
    if "data" in event:
        declared = (content_type or "application/json").split(";")[0].strip().lower()
        is_json = declared.endswith(("/json", "+json"))
        if not is_json and not isinstance(event["data"], str):
            problems.append("non-JSON datacontenttype needs 'data' as a string (json-format.md, 3.1.1)")
    return problems


def assert_valid_event(alert: Alert) -> None:
    problems = cloudevents_problems(alert.event)
    assert problems == [], problems
    assert alert.event["id"] == alert.id
    assert orjson.loads(alert.payload()) == alert.event


GOOD_EVENT = {
    "specversion": "1.0",
    "type": "com.example.someevent",
    "source": "/mycontext",
    "id": "A234-1234-1234",
    "time": "2018-04-05T17:31:00Z",
    "comexampleextension1": "value",
    "comexampleothervalue": 5,
    "datacontenttype": "application/json",
    "data": {"appinfoA": "abc", "appinfoB": 123, "appinfoC": True},
}


def test_the_validator_accepts_the_example_event_of_the_json_format():
    """The JSON-valued example of json-format.md section 3.2 passes the validator."""
    assert cloudevents_problems(GOOD_EVENT) == []


@pytest.mark.parametrize(
    ("change", "remove"),
    [
        ({}, "id"),
        ({}, "source"),
        ({}, "specversion"),
        ({}, "type"),
        ({"id": ""}, None),
        ({"specversion": "0.3"}, None),
        ({"source": "has spaces"}, None),
        ({"source": "1bad-scheme:x"}, None),
        ({"time": "2018-04-05 17:31:00"}, None),
        ({"time": "2018-02-30T17:31:00Z"}, None),
        ({"Severity": "critical"}, None),
        ({"sev_level": "critical"}, None),
        ({"severity": {"level": "critical"}}, None),
        ({"count": 2**31}, None),
        ({"subject": "line\nbreak"}, None),
        ({"subject": ""}, None),
        ({"datacontenttype": "json"}, None),
        ({"data_base64": "AAAA"}, None),
        ({"value": math.nan}, None),
    ],
)
def test_the_validator_rejects_what_the_specification_forbids(change, remove):
    """Each broken variant of the example event is reported by the validator."""
    event = copy.deepcopy(GOOD_EVENT) | change
    if remove:
        del event[remove]
    assert cloudevents_problems(event) != []


# ---------------------------------------------------------------- running a tracker


class Clock:
    """Subgroup index and time for a test run, advanced by hand."""

    def __init__(self, index: int = 100, now: int = T0) -> None:
        self.index = index
        self.now = now


def feed(
    tracker: AlertTracker, clock: Clock, rules: list[RuleId] | tuple[RuleId, ...] = (), advance: int = MINUTE
) -> list[Alert]:
    clock.index += 1
    clock.now += advance
    signals = [make_signal(rule, clock.index) for rule in rules]
    contexts = [
        make_context(tracker.chart_id, subgroup_end_ms=clock.now - 1_000, subgroup_start_ms=clock.now - 6_000)
    ] * len(signals)
    alerts = tracker.observe(signals, contexts, subgroup_index=clock.index, now_ms=clock.now)
    assert len(alerts) <= 1
    for alert in alerts:
        assert_valid_event(alert)
    return alerts


def data(alert: Alert) -> dict[str, object]:
    value = alert.event["data"]
    assert isinstance(value, dict)
    return value


def test_a_signal_in_control_raises_one_alert_led_by_the_most_severe_signal():
    """Three signals in one subgroup give one raised alert; beyond-limits leads, the others follow."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [alert] = feed(tracker, clock, [RuleId.SAME_SIDE_RUN, RuleId.BEYOND_LIMITS, RuleId.HUGGING_CENTER])
    assert alert.kind is AlertKind.RAISED
    assert tracker.state is ChartState.OUT_OF_CONTROL
    assert tracker.active_alert_id == alert.id
    body = data(alert)
    assert body["rule"] == "beyond_limits"
    assert body["severity"] == "critical"
    assert [s["rule"] for s in body["other_signals"]] == ["same_side_run", "hugging_center"]
    assert body["advisory"] == ADVISORY
    assert body["hint"] == "Check the die inserts of press 1 for wear."
    assert body["acknowledged"] is False
    assert body["acknowledge"] == {"topic": "line-monitor/ack/press-1/thickness", "alert_id": alert.id}
    assert alert.event["type"] == "line-monitor.alert.raised"
    assert alert.event["subject"] == CHART
    assert alert.topic == "line-monitor/alerts/press-1/thickness"


def test_the_event_carries_every_documented_data_field():
    """The data object of a raised alert has the documented fields with the signal's values."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [alert] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    body = data(alert)
    expected = {
        "chart": CHART,
        "state": "out_of_control",
        "kind": "raised",
        "rule": "beyond_limits",
        "side": "upper",
        "severity": "critical",
        "statistic": "mean",
        "value": 8.061,
        "center": 8.0,
        "lower": 7.946,
        "upper": 8.054,
        "p_value": 0.00042,
        "p_value_method": "closed_form",
        "parent_model": "normal",
        "limits_version": 3,
        "suppressed_signals": 0,
        "acknowledged": False,
    }
    assert {k: body[k] for k in expected} == expected
    assert body["subgroup"] == {
        "index": clock.index,
        "start": "2026-02-25T06:14:14.000Z",
        "end": "2026-02-25T06:14:19.000Z",
        "size": 5,
    }
    assert body["message"] == describe(
        make_signal(subgroup=clock.index), make_context(subgroup_end_ms=clock.now - 1000)
    )
    assert alert.event["time"] == "2026-02-25T06:14:20.000Z"
    assert body["other_signals"] == []


def test_no_repeat_within_the_interval():
    """Signals within repeat_after_ms of the raised alert produce no further alert."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    for _ in range(14):
        assert feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=MINUTE) == []
    assert tracker.status(clock.now)["suppressed_signals"] == 14


def test_a_repeat_after_the_interval_reports_the_suppressed_signals():
    """Once repeat_after_ms has passed, the next signal repeats the alert with the count in between."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [raised] = feed(tracker, clock, [RuleId.SAME_SIDE_RUN])
    for _ in range(14):
        feed(tracker, clock, [RuleId.SAME_SIDE_RUN, RuleId.STEADY_TREND])
    [repeat] = feed(tracker, clock, [RuleId.SAME_SIDE_RUN])
    assert repeat.kind is AlertKind.REPEATED
    assert repeat.event["type"] == "line-monitor.alert.repeated"
    assert repeat.id != raised.id
    body = data(repeat)
    assert body["suppressed_signals"] == 28
    assert body["raised_alert_id"] == raised.id
    assert body["acknowledge"] == {"topic": "line-monitor/ack/press-1/thickness", "alert_id": raised.id}
    assert tracker.active_alert_id == raised.id
    assert feed(tracker, clock, [RuleId.SAME_SIDE_RUN]) == []


def test_the_repeat_interval_counts_from_the_last_alert_exactly():
    """A signal at exactly repeat_after_ms after the last alert repeats; one millisecond earlier does not."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    assert feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=15 * MINUTE - 1) == []
    [repeat] = feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=1)
    assert repeat.kind is AlertKind.REPEATED
    assert data(repeat)["suppressed_signals"] == 1


def test_no_repeat_after_an_acknowledgement():
    """After the active alert is acknowledged, signals never repeat it, however long it lasts."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [raised] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    assert tracker.acknowledge(raised.id, "J. Doe", clock.now + 1, note="Changing the insert.")
    for _ in range(50):
        assert feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=30 * MINUTE) == []
    status = tracker.status(clock.now)
    assert status["acknowledged"] is True
    assert status["acknowledged_by"] == "J. Doe"
    assert status["acknowledgement_note"] == "Changing the insert."
    assert status["suppressed_signals"] == 50


def test_the_latest_repeat_can_be_acknowledged_too():
    """The id of the latest repeated alert acknowledges the episode as well as the raised id does."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    [repeat] = feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=20 * MINUTE)
    assert tracker.acknowledge(repeat.id, "J. Doe", clock.now)
    assert feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=20 * MINUTE) == []


def test_a_second_acknowledgement_keeps_the_first():
    """Acknowledging again (a redelivered message, or someone else) returns True and keeps the first."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [raised] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    assert tracker.acknowledge(raised.id, "J. Doe", clock.now + 5)
    assert tracker.acknowledge(raised.id, "A. Roe", clock.now + 9)
    status = tracker.status(clock.now + 10)
    assert (status["acknowledged_by"], status["acknowledged_at"]) == ("J. Doe", "2026-02-25T06:14:20.005Z")


def test_clear_after_the_configured_quiet_subgroups():
    """K quiet subgroups in a row clear the alert; a signal in between restarts the count."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [raised] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    assert feed(tracker, clock) == []
    assert feed(tracker, clock) == []
    assert feed(tracker, clock, [RuleId.MIDDLE_ZONE_CLUSTER]) == []
    assert feed(tracker, clock) == []
    assert feed(tracker, clock) == []
    assert tracker.state is ChartState.OUT_OF_CONTROL
    [cleared] = feed(tracker, clock)
    assert cleared.kind is AlertKind.CLEARED
    assert cleared.event["type"] == "line-monitor.alert.cleared"
    assert tracker.state is ChartState.IN_CONTROL
    assert tracker.active_alert_id is None
    body = data(cleared)
    assert body["raised_alert_id"] == raised.id
    assert body["state"] == "in_control"
    assert body["suppressed_signals"] == 1
    assert body["advisory"] == ADVISORY
    assert raised.id in str(body["message"])
    assert feed(tracker, clock) == []


def test_a_new_raise_after_a_clear_gets_a_new_id():
    """A chart that goes out of control again gets a fresh raised alert with a new id."""
    tracker, clock = AlertTracker(CHART, replace(SETTINGS, clear_after_subgroups=1)), Clock()
    [first] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    [cleared] = feed(tracker, clock)
    [second] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    assert second.kind is AlertKind.RAISED
    assert len({first.id, cleared.id, second.id}) == 3
    assert tracker.active_alert_id == second.id


def test_acknowledging_a_wrong_or_old_id_is_refused():
    """Ids of a previous episode, of another chart, or made up are refused and change nothing."""
    tracker, clock = AlertTracker(CHART, replace(SETTINGS, clear_after_subgroups=1)), Clock()
    assert not tracker.acknowledge("anything", "J. Doe", clock.now)  # in control: nothing to ack
    [old] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    feed(tracker, clock)
    [current] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    other = AlertTracker("press-2/thickness", SETTINGS)
    [foreign] = feed(other, Clock(), [RuleId.BEYOND_LIMITS])
    for wrong in (old.id, foreign.id, current.id + "x", "", current.id.upper()):
        assert not tracker.acknowledge(wrong, "J. Doe", clock.now)
    assert not tracker.status(clock.now)["acknowledged"]
    [repeat] = feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=20 * MINUTE)
    assert repeat.kind is AlertKind.REPEATED


def test_a_cleared_alert_reports_its_acknowledgement():
    """The cleared alert says who acknowledged the episode, and the next episode starts unacknowledged."""
    tracker, clock = AlertTracker(CHART, replace(SETTINGS, clear_after_subgroups=1)), Clock()
    [raised] = feed(tracker, clock, [RuleId.STEADY_TREND])
    tracker.acknowledge(raised.id, "J. Doe", clock.now)
    [cleared] = feed(tracker, clock)
    assert data(cleared)["acknowledged"] is True
    assert data(cleared)["acknowledged_by"] == "J. Doe"
    feed(tracker, clock, [RuleId.STEADY_TREND])
    assert tracker.status(clock.now)["acknowledged"] is False


def test_repeat_after_zero_repeats_at_every_signalling_subgroup():
    """With repeat_after_ms = 0 every signalling subgroup of an unacknowledged episode alerts."""
    tracker, clock = AlertTracker(CHART, replace(SETTINGS, repeat_after_ms=0)), Clock()
    kinds = [a.kind for _ in range(4) for a in feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=0)]
    assert kinds == [AlertKind.RAISED, AlertKind.REPEATED, AlertKind.REPEATED, AlertKind.REPEATED]


def test_a_tracker_collecting_its_baseline_moves_to_in_control_when_charting_starts():
    """collecting_baseline holds until the first charted subgroup; signals during it are refused."""
    tracker = AlertTracker(CHART, SETTINGS, collecting_baseline=True)
    assert tracker.state is ChartState.COLLECTING_BASELINE
    assert tracker.observe([], [], subgroup_index=1, now_ms=T0, collecting_baseline=True) == []
    signal = make_signal(subgroup=2)
    with pytest.raises(ValueError, match="baseline"):
        tracker.observe([signal], [make_context()], subgroup_index=2, now_ms=T0, collecting_baseline=True)
    assert tracker.status(T0)["state"] == "collecting_baseline"
    assert tracker.observe([], [], subgroup_index=3, now_ms=T0 + 1) == []
    assert tracker.state is ChartState.IN_CONTROL
    assert tracker.status(T0 + 2)["since"] == "2026-02-25T06:13:20.001Z"


@pytest.mark.parametrize(
    ("signals", "contexts", "index", "message"),
    [
        ([make_signal(subgroup=5)], [], 5, "contexts"),
        ([make_signal(subgroup=5)], [make_context("press-2/width")], 5, "press-2/width"),
        ([make_signal(subgroup=4)], [make_context()], 5, "subgroup 4"),
        ([], [], 3, "does not follow"),
    ],
)
def test_observe_refuses_inconsistent_input(signals, contexts, index, message):
    """Mismatched contexts, another chart's context, another subgroup's signal, a stale index: refused."""
    tracker = AlertTracker(CHART, SETTINGS)
    tracker.observe([], [], subgroup_index=4, now_ms=T0)
    with pytest.raises(ValueError, match=message):
        tracker.observe(signals, contexts, subgroup_index=index, now_ms=T0)


def test_not_a_number_becomes_null_in_the_event():
    """A NaN p-value or infinite limit is written as null, so the event stays strict JSON."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    signal = replace(make_signal(subgroup=clock.index + 1), lower=-math.inf)
    [alert] = tracker.observe(
        [signal], [make_context(p_value=math.nan)], subgroup_index=clock.index + 1, now_ms=T0
    )
    assert data(alert)["p_value"] is None
    assert data(alert)["lower"] is None
    assert_valid_event(alert)


def test_the_module_reads_no_clock(monkeypatch):
    """A whole episode runs with the clock functions of the time module made to fail."""

    def no_clock() -> float:
        raise AssertionError("the alerting module read the clock")

    for name in ("time", "time_ns", "monotonic", "monotonic_ns", "perf_counter"):
        monkeypatch.setattr(time, name, no_clock)
    tracker, clock = AlertTracker(CHART, replace(SETTINGS, clear_after_subgroups=1)), Clock()
    [raised] = feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    feed(tracker, clock, [RuleId.BEYOND_LIMITS], advance=20 * MINUTE)
    tracker.acknowledge(raised.id, "J. Doe", clock.now)
    tracker.status(clock.now)
    [cleared] = feed(tracker, clock)
    assert cleared.kind is AlertKind.CLEARED


def test_importing_the_module_loads_no_io_library():
    """monitor.alerts pulls in no asyncio, MQTT, database or logging library."""
    code = (
        "import sys, monitor.alerts\n"
        "bad = [m for m in sys.modules if m.split('.')[0] in "
        "('asyncio', 'aiomqtt', 'paho', 'sqlalchemy', 'structlog', 'aiosqlite', 'psycopg')]\n"
        "print(','.join(sorted(bad)))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert result.stdout.strip() == ""


def test_the_caution_matches_the_command_line_text():
    """The advisory caution here is word for word the one the command line prints."""
    assert ADVISORY == CLI_ADVISORY
    assert "not a safety system" in ADVISORY
    assert "local codes and licensed practice" in ADVISORY


# ---------------------------------------------------------------- status


def test_the_status_body_describes_the_open_episode():
    """The retained status names state, since, active alert, acknowledgement and the last signal."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    assert tracker.status(T0)["state"] == "in_control"
    [raised] = feed(tracker, clock, [RuleId.OUTER_ZONE_CLUSTER])
    tracker.acknowledge(raised.id, "J. Doe", clock.now + 1_000)
    status = tracker.status(clock.now + 2_000)
    assert status["chart"] == CHART
    assert status["state"] == "out_of_control"
    assert status["since"] == "2026-02-25T06:14:20.000Z"
    assert status["active_alert_id"] == raised.id
    assert status["severity"] == "warning"
    assert status["acknowledged_by"] == "J. Doe"
    assert status["acknowledged_at"] == "2026-02-25T06:14:21.000Z"
    assert status["updated"] == "2026-02-25T06:14:22.000Z"
    assert status["advisory"] == ADVISORY
    assert status["ack_topic"] == "line-monitor/ack/press-1/thickness"
    last = status["last_signal"]
    assert isinstance(last, dict)
    assert last["rule"] == "outer_zone_cluster"
    assert "J. Doe" in str(status["summary"])
    json.dumps(status, allow_nan=False)


def test_the_status_severity_rises_with_a_more_severe_signal_even_when_held_back():
    """A critical signal after an acknowledged warning raises the status severity, without an alert."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    [raised] = feed(tracker, clock, [RuleId.STEADY_TREND])
    tracker.acknowledge(raised.id, "J. Doe", clock.now)
    assert feed(tracker, clock, [RuleId.BEYOND_LIMITS]) == []
    assert tracker.status(clock.now)["severity"] == "critical"
    assert feed(tracker, clock, [RuleId.HUGGING_CENTER]) == []
    assert tracker.status(clock.now)["severity"] == "critical"


# ---------------------------------------------------------------- ids and topics


def test_alert_ids_are_deterministic():
    """The same chart, subgroup, kind and sequence give the same id, in any process."""
    first = alert_id(CHART, 143, AlertKind.RAISED, 7)
    assert first == alert_id(CHART, 143, AlertKind.RAISED, 7)
    code = f"from monitor.alerts import alert_id, AlertKind; print(alert_id({CHART!r}, 143, AlertKind.RAISED, 7))"
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert result.stdout.strip() == first


def test_reprocessing_a_subgroup_from_a_snapshot_gives_the_same_alert():
    """A crash after a subgroup and a restart from the snapshot before it yield the identical alert."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    feed(tracker, clock)
    saved = orjson.loads(orjson.dumps(tracker.to_state()))
    [first] = feed(tracker, Clock(clock.index, clock.now), [RuleId.BEYOND_LIMITS])
    restored = AlertTracker.from_state(CHART, SETTINGS, saved)
    [again] = feed(restored, Clock(clock.index, clock.now), [RuleId.BEYOND_LIMITS])
    assert again == first


@given(
    chart=st.from_regex(
        r"[A-Za-z0-9][A-Za-z0-9._-]{0,20}(/[A-Za-z0-9][A-Za-z0-9._-]{0,20}){0,3}", fullmatch=True
    ),
    index=st.integers(0, 10**12),
    kind=st.sampled_from(list(AlertKind)),
    sequence=st.integers(0, 10**9),
)
def test_alert_ids_are_safe_topic_levels_and_keys(chart, index, kind, sequence):
    """Ids use only letters, digits, '.', '_' and '-', stay short, and change with every input."""
    ident = alert_id(chart, index, kind, sequence)
    assert re.fullmatch(r"[A-Za-z0-9._-]+", ident)
    assert len(ident) <= 140
    others = {
        alert_id(chart + "x", index, kind, sequence),
        alert_id(chart, index + 1, kind, sequence),
        alert_id(
            chart, index, AlertKind.CLEARED if kind is not AlertKind.CLEARED else AlertKind.RAISED, sequence
        ),
        alert_id(chart, index, kind, sequence + 1),
    }
    assert ident not in others
    assert len(others) == 4


def test_charts_whose_shortened_names_agree_get_different_ids():
    """Long chart ids that differ only past the readable part, or by '/' against '.', still differ."""
    stem = "a" * 60
    assert alert_id(stem + "/x", 1, AlertKind.RAISED, 1) != alert_id(stem + "/y", 1, AlertKind.RAISED, 1)
    assert alert_id("a/b", 1, AlertKind.RAISED, 1) != alert_id("a.b", 1, AlertKind.RAISED, 1)


@pytest.mark.parametrize(("index", "sequence"), [(-1, 1), (1, -1), (True, 1), (1.0, 1)])
def test_alert_id_refuses_negative_or_non_integer_parts(index, sequence):
    """Negative or non-integer subgroup indices and sequences are refused."""
    with pytest.raises(ValueError, match="integer"):
        alert_id(CHART, index, AlertKind.RAISED, sequence)


VALID_CHART_IDS = st.from_regex(
    r"[A-Za-z0-9][A-Za-z0-9._-]{0,30}(/[A-Za-z0-9][A-Za-z0-9._-]{0,30}){0,5}", fullmatch=True
)


@given(
    chart=VALID_CHART_IDS, prefix=st.sampled_from(["line-monitor", "plant-2/spc", "a", "site.1/area_2/x-y"])
)
def test_topics_accept_every_valid_chart_id_and_never_make_a_wildcard_or_empty_level(chart, prefix):
    """Valid chart ids give three distinct topics without '+', '#' or an empty level."""
    result = topics(AlertSettings(prefix=prefix), chart)
    assert result == (f"{prefix}/alerts/{chart}", f"{prefix}/status/{chart}", f"{prefix}/ack/{chart}")
    for topic in result:
        assert "+" not in topic
        assert "#" not in topic
        assert "" not in topic.split("/")
        assert not topic.startswith("$")


@pytest.mark.parametrize(
    "chart", ["", "/a", "a/", "a//b", "a/+", "a/#", "+", "-a", "a b", "a/.b", "ä", "a" * 201, "$SYS/x"]
)
def test_topics_refuse_invalid_chart_ids(chart):
    """Chart ids outside the configured pattern are refused, never turned into topics."""
    with pytest.raises(ValueError, match="chart id"):
        topics(SETTINGS, chart)


@pytest.mark.parametrize("prefix", ["", "a//b", "/a", "a/", "a/+/b", "a/#", "$SYS", "a\x00b", "a" * 201])
def test_settings_refuse_a_prefix_that_is_not_plain_topic_levels(prefix):
    """Empty levels, wildcards, '$' at the start and control characters are refused in the prefix."""
    with pytest.raises(ConfigError, match="prefix"):
        AlertSettings(prefix=prefix)


@pytest.mark.parametrize(
    "changes",
    [
        {"source": ""},
        {"source": "has space"},
        {"repeat_after_ms": -1},
        {"repeat_after_ms": 1.5},
        {"clear_after_subgroups": 0},
        {"clear_after_subgroups": True},
        {"severity": {"rule_one": Severity.INFO}},
        {"severity": {"beyond_limits": "urgent"}},
    ],
)
def test_settings_refuse_bad_values(changes):
    """Bad sources, negative or non-integer counts, unknown rules and severities are refused."""
    with pytest.raises(ConfigError):
        AlertSettings(**changes)


def test_default_severities_cover_every_rule():
    """Every rule has a default severity; beyond-limits is critical, the patterns without direction info."""
    assert set(DEFAULT_SEVERITY) == {r.value for r in RuleId}
    assert DEFAULT_SEVERITY["beyond_limits"] is Severity.CRITICAL
    for rule in ("alternating_run", "hugging_center", "avoiding_center"):
        assert DEFAULT_SEVERITY[rule] is Severity.INFO
    tuned = AlertSettings(severity={"steady_trend": "critical"})
    assert tuned.severity["steady_trend"] is Severity.CRITICAL
    assert tuned.severity["same_side_run"] is Severity.WARNING


# ---------------------------------------------------------------- describe()

RULE_WORDS = [r.value for r in RuleId]


@pytest.mark.parametrize(
    "statistic", [s for s in Statistic if s not in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER)]
)
def test_every_rule_and_side_gets_a_distinct_plain_sentence(statistic):
    """describe() gives one distinct, jargon-free sentence per rule and side, naming value and limit."""
    sentences = set()
    for rule in RuleId:
        for side in Side:
            signal = make_signal(rule, 150, side, statistic=statistic)
            sentence = describe(signal, make_context(unit=None))
            assert sentence.strip()
            assert sentence.endswith(".")
            assert re.search(r"\.\s", sentence) is None  # one sentence
            lowered = sentence.lower()
            assert "sigma" not in lowered
            assert " z " not in lowered
            assert "z-" not in lowered
            for word in RULE_WORDS:
                assert word not in sentence
            assert "8.061" in sentence
            if side is Side.UPPER:
                assert "8.054" in sentence
            elif side is Side.LOWER:
                assert "7.946" in sentence
            else:
                assert "7.946" in sentence
                assert "8.054" in sentence
            assert "subgroup 150" in sentence
            assert "Tile thickness on press-1/thickness" in sentence
            assert "Check the die" not in sentence
            assert ADVISORY not in sentence
            sentences.add(sentence)
    assert len(sentences) == len(RuleId) * len(Side)


def test_the_example_sentence_reads_as_intended():
    """A mean beyond its upper limit reads like the example given to crews."""
    signal = make_signal(RuleId.BEYOND_LIMITS, 143)
    context = make_context(unit=None, subgroup_end_ms=T0 + 30_000)
    assert describe(signal, context) == (
        "Tile thickness on press-1/thickness: the average of the last 5 readings, 8.061, is above its "
        "upper control limit 8.054 (subgroup 143, 06:13:50 UTC)."
    )


def test_a_shift_sum_sentence_names_its_direction_threshold_and_start():
    """A CUSUM signal reads as built-up evidence of a shift, with threshold and likely start."""
    signal = Signal(
        ChartKind.CUSUM, Statistic.CUSUM_LOWER, RuleId.BEYOND_LIMITS, Side.LOWER, 150, tuple(range(141, 151)),
        5.31, 0.0, None, 5.0, run_start=141,
    )  # fmt: skip
    sentence = describe(signal, make_context())
    assert "downward shift" in sentence
    assert "5.31" in sentence
    assert "5.00" in sentence
    assert "subgroup 141" in sentence
    assert "mm" not in sentence  # the sum has no unit


def test_the_sentence_shows_the_unit_and_omits_an_unknown_time():
    """Values carry the configured unit; without subgroup times the sentence gives only the index."""
    sentence = describe(make_signal(), make_context(subgroup_end_ms=None, subgroup_start_ms=None, name=None))
    assert sentence.startswith("Chart press-1/thickness: ")
    assert "8.061 mm" in sentence
    assert "8.054 mm" in sentence
    assert sentence.endswith("(subgroup 10).")


# ---------------------------------------------------------------- parse_ack

GOOD_ACK = {"alert_id": "press-1.thickness.raised.143.1.0123456789abcdef", "by": "J. Doe"}


def ack_bytes(message: object) -> bytes:
    return json.dumps(message).encode()


def test_a_good_acknowledgement_is_read():
    """A well-formed message gives an AckRequest for the chart, with or without a note."""
    assert parse_ack(ack_bytes(GOOD_ACK), CHART) == AckRequest(CHART, GOOD_ACK["alert_id"], "J. Doe", None)
    noted = parse_ack(ack_bytes(GOOD_ACK | {"note": "Insert changed.\nLine restarted."}), CHART)
    assert noted.note == "Insert changed.\nLine restarted."


def test_the_limits_of_an_acknowledgement_are_inclusive():
    """100-character names, 1000-character notes and 4096-byte payloads are accepted."""
    message = GOOD_ACK | {"by": "b" * 100, "note": "n" * 1000}
    payload = ack_bytes(message)
    payload += b" " * (4096 - len(payload))
    assert len(payload) == 4096
    assert parse_ack(payload, CHART).by == "b" * 100


BAD_ACKS = {
    "empty payload": b"",
    "not JSON": b"acknowledged",
    "truncated JSON": b'{"alert_id": "x", "by": "J',
    "invalid UTF-8": b'{"alert_id": "x", "by": "J\xff"}',
    "overlong UTF-8": b'{"alert_id": "x", "by": "\xc0\xaf"}',
    "UTF-8 byte order mark": b"\xef\xbb\xbf" + ack_bytes(GOOD_ACK),
    "UTF-16": json.dumps(GOOD_ACK).encode("utf-16"),
    "over 4 KiB": ack_bytes(GOOD_ACK) + b" " * 4096,
    "huge": b"[" * 1_000_000,
    "deeply nested": b"[" * 3000 + b"]" * 3000,
    "a list": ack_bytes([GOOD_ACK]),
    "a string": ack_bytes("press-1.thickness.raised"),
    "null": b"null",
    "missing alert_id": ack_bytes({"by": "J. Doe"}),
    "missing by": ack_bytes({"alert_id": "x"}),
    "extra field": ack_bytes(GOOD_ACK | {"chart": CHART}),
    "duplicate field": b'{"alert_id": "x", "by": "J. Doe", "by": "A. Roe"}',
    "alert_id a number": ack_bytes(GOOD_ACK | {"alert_id": 143}),
    "alert_id empty": ack_bytes(GOOD_ACK | {"alert_id": ""}),
    "alert_id too long": ack_bytes(GOOD_ACK | {"alert_id": "x" * 201}),
    "by null": ack_bytes(GOOD_ACK | {"by": None}),
    "by a list": ack_bytes(GOOD_ACK | {"by": ["J. Doe"]}),
    "by empty": ack_bytes(GOOD_ACK | {"by": ""}),
    "by blank": ack_bytes(GOOD_ACK | {"by": "   "}),
    "by too long": ack_bytes(GOOD_ACK | {"by": "b" * 101}),
    "by with a newline": ack_bytes(GOOD_ACK | {"by": "J.\nDoe"}),
    "by with an escape character": ack_bytes(GOOD_ACK | {"by": "J. \x1b[31mDoe"}),
    "by with a lone surrogate": b'{"alert_id": "x", "by": "J. \\ud800Doe"}',
    "note a number": ack_bytes(GOOD_ACK | {"note": 5}),
    "note too long": ack_bytes(GOOD_ACK | {"note": "n" * 1001}),
    "NaN": b'{"alert_id": "x", "by": "J. Doe", "note": NaN}',
}


@pytest.mark.parametrize("payload", BAD_ACKS.values(), ids=BAD_ACKS.keys())
def test_bad_acknowledgements_are_refused_with_a_reason(payload):
    """Every malformed acknowledgement raises AckError naming the chart and a reason."""
    with pytest.raises(AckError) as caught:
        parse_ack(payload, CHART)
    assert caught.value.reason
    assert caught.value.chart_id == CHART
    assert CHART in str(caught.value)
    assert isinstance(caught.value, ValueError)


# ---------------------------------------------------------------- snapshots


def test_a_snapshot_of_another_kind_chart_or_newer_schema_is_refused():
    """from_state refuses foreign kinds, other charts, newer schemas and inconsistent snapshots."""
    tracker, clock = AlertTracker(CHART, SETTINGS), Clock()
    feed(tracker, clock, [RuleId.BEYOND_LIMITS])
    state = tracker.to_state()
    bad_states = [
        state | {"kind": "rule_set"},
        state | {"schema": 99},
        state | {"schema": "1"},
        state | {"state": "tripped"},
        state | {"sequence": "3"},
        state | {"active_id": None},
        state | {"severity": "urgent"},
    ]
    for bad in bad_states:
        with pytest.raises(StateError):
            AlertTracker.from_state(CHART, SETTINGS, bad)
    with pytest.raises(StateError, match="chart"):
        AlertTracker.from_state("press-2/thickness", SETTINGS, state)
    assert AlertTracker.from_state(CHART, SETTINGS, state).to_state() == state


# (kind, payload, clock advance in ms): "sub" payload = rules signalling in the subgroup,
# "ack" payload = which id to acknowledge.
OPERATIONS = st.lists(
    st.one_of(
        st.tuples(
            st.just("sub"),
            st.one_of(st.just(()), st.lists(st.sampled_from(list(RuleId)), max_size=3).map(tuple)),
            st.sampled_from([0, 1, MINUTE, 5 * MINUTE, 15 * MINUTE, 40 * MINUTE]),
        ),
        st.tuples(
            st.just("ack"), st.sampled_from(["active", "latest", "old", "made-up"]), st.integers(0, MINUTE)
        ),
    ),
    max_size=40,
)
SETTING_CHOICES = st.builds(
    AlertSettings,
    repeat_after_ms=st.sampled_from([0, MINUTE, 15 * MINUTE]),
    clear_after_subgroups=st.sampled_from([1, 2, 5]),
)


class Run:
    """Applies operations to a tracker and records everything observable."""

    def __init__(self) -> None:
        self.clock = Clock()
        self.issued: list[Alert] = []
        self.record: list[object] = []

    def apply(self, tracker: AlertTracker, operations: list[tuple[str, object, int]]) -> None:
        for kind, payload, advance in operations:
            if kind == "sub":
                assert isinstance(payload, tuple)
                alerts = feed(tracker, self.clock, list(payload), advance=advance)
                self.issued.extend(alerts)
                self.record.append(alerts)
            else:
                self.clock.now += advance
                raised = [a.id for a in self.issued if a.kind is AlertKind.RAISED]
                target = {
                    "active": tracker.active_alert_id or "none",
                    "latest": self.issued[-1].id if self.issued else "none",
                    "old": raised[0] if raised else "none",
                    "made-up": "press-1.thickness.raised.1.1.0000000000000000",
                }[str(payload)]
                self.record.append(tracker.acknowledge(target, "J. Doe", self.clock.now))
            self.record.append(tracker.status(self.clock.now))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(operations=OPERATIONS, alert_settings=SETTING_CHOICES)
def test_restore_at_any_step_then_continue_equals_never_stopping(operations, alert_settings):
    """Snapshot, JSON round trip and restore at every step, then continue: same alerts, statuses, state."""
    whole = Run()
    tracker = AlertTracker(CHART, alert_settings)
    whole.apply(tracker, operations)
    for cut in range(len(operations) + 1):
        split = Run()
        first = AlertTracker(CHART, alert_settings)
        split.apply(first, operations[:cut])
        saved = orjson.loads(orjson.dumps(first.to_state()))
        second = AlertTracker.from_state(CHART, alert_settings, saved)
        split.apply(second, operations[cut:])
        assert split.record == whole.record
        assert second.to_state() == tracker.to_state()


@settings(max_examples=150, deadline=None)
@given(operations=OPERATIONS, alert_settings=SETTING_CHOICES)
def test_the_alert_stream_follows_the_rules(operations, alert_settings):
    """Episodes open with one raise and close with one clear; repeats are spaced and stop after an ack."""
    run = Run()
    tracker = AlertTracker(CHART, alert_settings)
    open_episode = False
    acknowledged = False
    last_alert_ms = 0
    for operation in operations:
        before = len(run.issued)
        run.apply(tracker, [operation])
        if operation[0] == "ack" and run.record[-2] is True:
            assert open_episode
            acknowledged = True
        for alert in run.issued[before:]:
            if alert.kind is AlertKind.RAISED:
                assert not open_episode
                open_episode, acknowledged = True, False
            elif alert.kind is AlertKind.REPEATED:
                assert open_episode
                assert not acknowledged
                assert alert.created_ms - last_alert_ms >= alert_settings.repeat_after_ms
            else:
                assert open_episode
                open_episode = False
            last_alert_ms = alert.created_ms
        assert (tracker.state is ChartState.OUT_OF_CONTROL) == open_episode
    ids = [a.id for a in run.issued]
    assert len(ids) == len(set(ids))
