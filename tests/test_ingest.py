"""Decoding message payloads into readings, and routing topics to charts.

Sources named beside the checks: RFC 8259 (JSON), RFC 3339 (timestamps on the Internet, the
examples of section 5.8), ISO 8601 (the date-time format RFC 3339 profiles), and the OASIS
MQTT Version 3.1.1 standard (2014), section 4.7 (topic names, filters and wildcards).
"""

from __future__ import annotations

import calendar
import math
import re
from datetime import UTC, datetime, timedelta
from typing import Any

import orjson
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from monitor import ingest
from monitor.ingest import (
    PAYLOAD_REASONS,
    REJECTION_REASONS,
    Columns,
    Decoded,
    PayloadError,
    PayloadMapping,
    Rejection,
    Route,
    Router,
    _iso_seconds,
    _nesting,
    decode,
    decode_columns,
)
from monitor.spc import ConfigError, Reading, ReadingError
from monitor.topics import matches

PROPERTY = settings(
    max_examples=150,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    phases=[phase for phase in Phase if phase is not Phase.explain],
)

NOW = 1_709_294_400.0  # 2024-03-01T12:00:00Z, the receive time used throughout
NUMBER = PayloadMapping()
JSON = PayloadMapping(format="json")
FULL = PayloadMapping(format="json", timestamp="ts", sequence="seq", exposure="n")
ARRAY = PayloadMapping(format="json", batch="array")
ARRAY_FULL = PayloadMapping(format="json", timestamp="ts", sequence="seq", exposure="n", batch="array")
COLUMNS = PayloadMapping(format="json", timestamp="ts", batch="columns")
COLUMNS_FULL = PayloadMapping(format="json", timestamp="ts", sequence="seq", exposure="n", batch="columns")
STAMPED = PayloadMapping(format="json", timestamp="ts")


def _reason(payload: bytes, mapping: PayloadMapping) -> str:
    with pytest.raises(PayloadError) as caught:
        decode(payload, mapping, NOW)
    return caught.value.reason


def _time_of(stamp: object) -> float:
    (reading,) = decode(orjson.dumps({"value": 1.0, "ts": stamp}), STAMPED, NOW)
    return reading.time


# ================================================================ refusals, one reason at a time

REFUSALS = [
    # (reason, payload, mapping)
    ("not_utf8", b"8.0\xff", NUMBER),
    ("not_utf8", b'{"value": "8\xc3"}', JSON),
    ("not_utf8", b"\xed\xa0\x80", NUMBER),  # an encoded surrogate is not UTF-8 (RFC 3629)
    ("not_json", b'{"value": 8.0,}', JSON),  # RFC 8259 section 4: no trailing comma
    ("not_json", b'{"value": NaN}', JSON),  # RFC 8259 section 6: NaN is not a JSON number
    ("not_json", b'{"value": Infinity}', JSON),  # same
    ("not_json", b"{'value': 8.0}", JSON),  # RFC 8259 section 7: strings use double quotes
    ("not_json", b"", JSON),
    ("not_json", b'{"value": 8.0} {"value": 9.0}', JSON),  # one document per message
    ("not_a_number", b"eight", NUMBER),
    ("not_a_number", b"", NUMBER),
    ("not_a_number", b"   ", NUMBER),
    ("not_a_number", b"8,01", NUMBER),
    ("not_a_number", b"1_000", NUMBER),
    ("not_a_number", b"0x10", NUMBER),
    ("not_a_number", b"8.0 9.0", NUMBER),
    ("not_a_number", "\u0661\u0662".encode(), NUMBER),  # Arabic-Indic digits are not ASCII
    ("not_a_number", b'{"value": "eight"}', JSON),
    ("not_a_number", b'{"value": ""}', JSON),
    ("not_finite", b"NaN", NUMBER),
    ("not_finite", b"nan", NUMBER),
    ("not_finite", b"inf", NUMBER),
    ("not_finite", b"-Infinity", NUMBER),
    ("not_finite", b"1e400", NUMBER),
    ("not_finite", b'{"value": 1e400}', JSON),
    ("not_finite", b'{"value": "NaN"}', JSON),
    ("not_finite", b'{"value": "-1e999"}', JSON),
    ("not_positive", b'{"value": 1, "ts": 0, "seq": 1, "n": 0}', FULL),
    ("not_positive", b'{"value": 1, "ts": 0, "seq": 1, "n": -40}', FULL),
    ("missing_field", b'{"val": 8.0}', JSON),
    ("missing_field", b'{"value": 8.0}', STAMPED),
    ("missing_field", b'{"reading": {"v": 8.0}}', PayloadMapping(format="json", value="reading.value")),
    ("missing_field", b"[8.0]", PayloadMapping(format="json", timestamp="ts", batch="array")),
    ("wrong_type", b'{"value": true}', JSON),  # booleans are not numbers
    ("wrong_type", b'{"value": false}', JSON),
    ("wrong_type", b'{"value": null}', JSON),
    ("wrong_type", b'{"value": [8.0]}', JSON),
    ("wrong_type", b'{"value": {"x": 8.0}}', JSON),
    ("wrong_type", b"[8.0]", JSON),
    ("wrong_type", b"8.0", JSON),
    ("wrong_type", b'{"reading": 8.0}', PayloadMapping(format="json", value="reading.value")),
    ("wrong_type", b'{"value": 1, "ts": 0, "seq": 2.5, "n": 1}', FULL),
    ("wrong_type", b'{"value": 1, "ts": 0, "seq": "7", "n": 1}', FULL),
    ("wrong_type", b'{"value": 1, "ts": 0, "seq": true, "n": 1}', FULL),
    ("wrong_type", b'{"value": 1, "ts": true, "seq": 1, "n": 1}', FULL),
    ("wrong_type", b'{"value": 1, "ts": null, "seq": 1, "n": 1}', FULL),
    ("wrong_type", b'{"value": 1, "ts": 0, "seq": 1, "n": false}', FULL),
    ("wrong_type", b'{"value": 1}', ARRAY),
    ("wrong_type", b"[[1]]", ARRAY),
    ("wrong_type", b"[8.0]", COLUMNS),
    ("wrong_type", b'{"value": 8.0, "ts": [1]}', COLUMNS),
    ("too_large", b"8.0" + b" " * 8, PayloadMapping(max_bytes=10)),
    ("too_large", b"not json at all", PayloadMapping(format="json", max_bytes=10)),  # before parsing
    ("too_deep", b'{"value": 1, "x": ' + b"[" * 32 + b"]" * 32 + b"}", JSON),
    ("too_deep", b"[" * 2000 + b"]" * 2000, JSON),
    ("too_deep", b"[" * 100_000, JSON),  # refused before the end is even looked at
    ("empty_batch", b"[]", ARRAY),
    ("empty_batch", b'{"readings": []}', PayloadMapping(format="json", batch="array", items="readings")),
    ("empty_batch", b'{"value": [], "ts": []}', COLUMNS),
    ("bad_timestamp", b'{"value": 1, "ts": "yesterday"}', STAMPED),
    ("bad_timestamp", b'{"value": 1, "ts": "1700000000"}', STAMPED),  # strings are ISO 8601 only
    ("bad_timestamp", b'{"value": 1, "ts": "2024-13-01T00:00:00Z"}', STAMPED),
    ("bad_timestamp", b'{"value": 1, "ts": "2024-03-01T12:00:00+25:00"}', STAMPED),
    ("bad_timestamp", b'{"value": 1, "ts": -1}', STAMPED),
    ("bad_timestamp", b'{"value": 1, "ts": "2201-01-01T00:00:00Z"}', STAMPED),
    ("bad_timestamp", b'{"value": 1, "ts": "1969-12-31T23:59:59Z"}', STAMPED),
    ("batch_too_long", b"[1, 2, 3, 4]", PayloadMapping(format="json", batch="array", max_batch=3)),
    (
        "batch_too_long",
        b'{"value": [1, 2, 3, 4], "ts": [0, 0, 0, 0]}',
        PayloadMapping(format="json", timestamp="ts", batch="columns", max_batch=3),
    ),
    ("mismatched_columns", b'{"value": [1, 2], "ts": [0]}', COLUMNS),
    ("mismatched_columns", b'{"value": [], "ts": [0]}', COLUMNS),
]


@pytest.mark.parametrize(("reason", "payload", "mapping"), REFUSALS)
def test_each_bad_payload_is_refused_with_its_reason(
    reason: str, payload: bytes, mapping: PayloadMapping
) -> None:
    """Every example of a bad payload raises a PayloadError with the expected reason code."""
    assert _reason(payload, mapping) == reason


def test_every_reason_code_has_an_example() -> None:
    """The catalogue of refusals covers every reason code, and lists no unknown one."""
    assert {r for r, _, _ in REFUSALS} == set(PAYLOAD_REASONS)


def test_reason_codes_are_snake_case_and_distinct() -> None:
    """Reason codes are stable snake_case words, each listed once."""
    assert len(set(PAYLOAD_REASONS)) == len(PAYLOAD_REASONS)
    for reason in (*PAYLOAD_REASONS, *REJECTION_REASONS):
        assert re.fullmatch(r"[a-z0-9]+(_[a-z0-9]+)*", reason)


def test_a_payload_error_is_a_reading_error_with_a_readable_message() -> None:
    """PayloadError belongs to the core's error tree; its message names the field and the value."""
    with pytest.raises(ReadingError) as caught:
        decode(b'{"value": "eight"}', JSON, NOW)
    error = caught.value
    assert isinstance(error, PayloadError)
    assert error.position is None
    assert error.detail == "field 'value' is not a number: 'eight'"
    assert str(error) == error.detail


def test_error_messages_shorten_long_values() -> None:
    """A long bad value is cut in the message, so one message cannot flood the logs."""
    payload = orjson.dumps({"value": "x" * 5000})
    with pytest.raises(PayloadError) as caught:
        decode(payload, JSON, NOW)
    assert len(str(caught.value)) < 120


def test_depth_at_the_limit_is_accepted() -> None:
    """Nesting exactly max_depth deep is allowed; one level more is refused."""
    mapping = PayloadMapping(format="json", max_depth=4)
    inside = b'{"value": 1, "x": [[[]]]}'  # the object and three arrays: depth 4
    assert decode(inside, mapping, NOW)[0].value == 1.0
    assert _reason(b'{"value": 1, "x": [[[[]]]]}', mapping) == "too_deep"


def test_brackets_inside_strings_do_not_count_as_depth() -> None:
    """Brackets, braces and escaped quotes inside JSON strings are text, not nesting."""
    mapping = PayloadMapping(format="json", max_depth=1)
    payload = b'{"value": 1, "note": "[[[{{{ \\" ]]] \\\\"}'
    assert decode(payload, mapping, NOW)[0].value == 1.0


# ================================================================ good payloads

GOOD_NUMBERS = [
    (b"8.01", 8.01),
    (b" 8.01\r\n", 8.01),
    (b"\t-0.5 ", -0.5),
    (b"+3", 3.0),
    (b"42", 42.0),
    (b"1e-3", 0.001),
    (b"6.02E23", 6.02e23),
    (b".5", 0.5),
    (b"5.", 5.0),
    (b"-0", -0.0),
    (b"\xef\xbb\xbf8.01", 8.01),  # a leading UTF-8 byte order mark is ignored
]


@pytest.mark.parametrize(("payload", "value"), GOOD_NUMBERS)
def test_bare_numbers_are_read_at_the_receive_time(payload: bytes, value: float) -> None:
    """A 'number' payload is one decimal number, whitespace around it allowed, timed on receipt."""
    assert decode(payload, NUMBER, NOW) == [Decoded(value, NOW, None, None, 0)]


GOOD_SINGLE = [
    # (payload, mapping, (value, time, sequence, exposure))
    (b'{"value": 8.01}', JSON, (8.01, NOW, None, None)),
    (b'{"value": 8}', JSON, (8.0, NOW, None, None)),
    (b'{"value": -8.01e-2}', JSON, (-0.0801, NOW, None, None)),
    (b'{"value": "8.01"}', JSON, (8.01, NOW, None, None)),  # numeric strings are numbers
    (b'{"value": " 8.01 "}', JSON, (8.01, NOW, None, None)),
    (b'\xef\xbb\xbf{"value": 1}', JSON, (1.0, NOW, None, None)),  # RFC 8259 section 8.1
    (b"8.01", PayloadMapping(format="json", value=""), (8.01, NOW, None, None)),
    (b'"8.01"', PayloadMapping(format="json", value=""), (8.01, NOW, None, None)),
    (
        b'{"reading": {"value": 8.01, "at": "2024-03-01T12:00:01Z"}}',
        PayloadMapping(format="json", value="reading.value", timestamp="reading.at"),
        (8.01, NOW + 1, None, None),
    ),
    (
        b'{"value": 3, "ts": 1709294400, "seq": 17, "n": 50}',
        FULL,
        (3.0, NOW, 17, 50.0),
    ),
    (
        b'{"value": 3, "ts": 1709294400500, "seq": 17.0, "n": "12.5"}',
        FULL,
        (3.0, NOW + 0.5, 17, 12.5),
    ),
    (b'{"value": 1, "value": 2}', JSON, (2.0, NOW, None, None)),  # RFC 8259 4: last name wins here
    (b'{"value": 1, "extra": {"deep": [1, 2, {"x": null}]}}', JSON, (1.0, NOW, None, None)),
]


@pytest.mark.parametrize(("payload", "mapping", "expected"), GOOD_SINGLE)
def test_single_json_readings_are_read_as_mapped(
    payload: bytes, mapping: PayloadMapping, expected: tuple[float, float, int | None, float | None]
) -> None:
    """Each good JSON document gives exactly the expected reading."""
    value, time, sequence, exposure = expected
    assert decode(payload, mapping, NOW) == [Decoded(value, time, sequence, exposure, 0)]


def test_array_batches_of_objects_keep_message_order() -> None:
    """An array of objects gives one reading per element, in order, with positions."""
    payload = orjson.dumps(
        [
            {"value": 1.5, "ts": "2024-03-01T12:00:00Z", "seq": 1, "n": 10},
            {"value": "2.5", "ts": 1709294401, "seq": 2, "n": 20},
            {"value": 3, "ts": 1709294402000, "seq": 3, "n": 30.0},
        ]
    )
    assert decode(payload, ARRAY_FULL, 0.0) == [
        Decoded(1.5, NOW, 1, 10.0, 0),
        Decoded(2.5, NOW + 1, 2, 20.0, 1),
        Decoded(3.0, NOW + 2, 3, 30.0, 2),
    ]


def test_array_batches_may_hold_bare_values() -> None:
    """An array of bare numbers (or numeric strings) gives readings at the receive time."""
    assert decode(b'[8.0, 8.1, "8.2"]', ARRAY, NOW) == [
        Decoded(8.0, NOW, None, None, 0),
        Decoded(8.1, NOW, None, None, 1),
        Decoded(8.2, NOW, None, None, 2),
    ]


def test_array_batches_may_sit_inside_the_document() -> None:
    """With `items`, the array is found at a dotted path of the document."""
    mapping = PayloadMapping(format="json", batch="array", items="data.points", value="v")
    payload = b'{"device": "gauge-3", "data": {"points": [{"v": 1}, {"v": 2}]}}'
    assert [d.value for d in decode(payload, mapping, NOW)] == [1.0, 2.0]


def test_column_batches_zip_parallel_arrays() -> None:
    """A 'columns' batch reads element i of every named array as reading i."""
    payload = b'{"value": [1, 2], "ts": ["2024-03-01T12:00:00Z", 1709294401], "seq": [5, 6], "n": [4, 8]}'
    assert decode(payload, COLUMNS_FULL, 0.0) == [
        Decoded(1.0, NOW, 5, 4.0, 0),
        Decoded(2.0, NOW + 1, 6, 8.0, 1),
    ]


def test_column_batches_may_use_dotted_paths() -> None:
    """Column paths may reach into nested objects."""
    mapping = PayloadMapping(format="json", value="cols.v", timestamp="cols.t", batch="columns")
    payload = b'{"cols": {"v": [7, 8], "t": [1709294400, 1709294400]}}'
    assert [(d.value, d.time) for d in decode(payload, mapping, 0.0)] == [(7.0, NOW), (8.0, NOW)]


def test_a_decoded_reading_becomes_a_core_reading() -> None:
    """Decoded.to_reading carries value, time and exposure into the core's Reading."""
    assert Decoded(2.0, 60.0, 4, 40.0, 3).to_reading() == Reading(2.0, 60.0, 40.0)


def test_integral_floats_are_sequence_numbers_but_huge_ones_are_not() -> None:
    """5.0 is sequence 5; a float beyond 2**53 cannot be an exact integer and is refused."""
    payload = b'{"value": 1, "ts": 0, "seq": 5.0, "n": 1}'
    assert decode(payload, FULL, NOW)[0].sequence == 5
    assert _reason(b'{"value": 1, "ts": 0, "seq": 1e300, "n": 1}', FULL) == "wrong_type"


# ================================================================ timestamps

# RFC 3339 section 5.8, "Examples", all five; the expected seconds come from calendar.timegm
# on the broken-down UTC time the RFC's own explanation gives for each example.
RFC3339_EXAMPLES = [
    # "1985-04-12T23:20:50.52Z": 20 minutes and 50.52 seconds after the 23rd hour of
    # April 12th, 1985 in UTC.
    ("1985-04-12T23:20:50.52Z", calendar.timegm((1985, 4, 12, 23, 20, 50)) + 0.52),
    # "1996-12-19T16:39:57-08:00": 39 minutes and 57 seconds after the 16th hour of
    # December 19th, 1996 with an offset of -08:00 from UTC; equivalent to 1996-12-20T00:39:57Z.
    ("1996-12-19T16:39:57-08:00", calendar.timegm((1996, 12, 20, 0, 39, 57))),
    # "1990-12-31T23:59:60Z": the leap second inserted at the end of 1990. Seconds since the
    # epoch cannot name it; it is read as the next second, 1991-01-01T00:00:00Z.
    ("1990-12-31T23:59:60Z", calendar.timegm((1991, 1, 1, 0, 0, 0))),
    # "1990-12-31T15:59:60-08:00": the same leap second in Pacific Standard Time.
    ("1990-12-31T15:59:60-08:00", calendar.timegm((1991, 1, 1, 0, 0, 0))),
]


@pytest.mark.parametrize(("stamp", "seconds"), RFC3339_EXAMPLES)
def test_rfc3339_examples_give_the_instants_the_rfc_describes(stamp: str, seconds: float) -> None:
    """The examples of RFC 3339 section 5.8 decode to the instant the RFC explains."""
    assert _time_of(stamp) == pytest.approx(seconds, abs=1e-6)


def test_the_rfc3339_example_before_1970_is_understood_and_refused() -> None:
    """RFC 3339 5.8's 1937-01-01T12:00:27.87+00:20 parses (11:40:27.87Z) but is outside 1970-2200."""
    seconds = calendar.timegm((1937, 1, 1, 11, 40, 27)) + 0.87
    assert _iso_seconds("1937-01-01T12:00:27.87+00:20", "ts") == pytest.approx(seconds, abs=1e-6)
    assert _reason(b'{"value": 1, "ts": "1937-01-01T12:00:27.87+00:20"}', STAMPED) == "bad_timestamp"


@pytest.mark.parametrize(
    ("stamp", "seconds"),
    [
        # RFC 3339 section 5.6 NOTE: "T" and "Z" may be lower case; a space may replace "T"
        ("2024-03-01t12:00:00z", NOW),
        ("2024-03-01 12:00:00Z", NOW),
        # RFC 3339 section 4.3: "-00:00" is UTC with the local offset unknown
        ("2024-03-01T12:00:00-00:00", NOW),
        ("2024-03-01T13:30:00+01:30", NOW),
        # ISO 8601 without an offset is local time of an unknown place; we read it as UTC
        ("2024-03-01T12:00:00", NOW),
        ("2024-03-01T12:00:00.250Z", NOW + 0.25),
        # ISO 8601 basic format
        ("20240301T120000Z", NOW),
    ],
)
def test_other_iso8601_forms_are_read(stamp: str, seconds: float) -> None:
    """Lower-case separators, offsets, naive times (as UTC), fractions and the basic format are read."""
    assert _time_of(stamp) == pytest.approx(seconds, abs=1e-6)


@pytest.mark.parametrize(
    ("stamp", "seconds"),
    [
        (1709294400, NOW),  # epoch seconds
        (1709294400.25, NOW + 0.25),
        (1709294400000, NOW),  # larger than 1e11: epoch milliseconds
        (1709294400250, NOW + 0.25),
        (0, 0.0),  # 1970-01-01T00:00:00Z, the first accepted instant
        (7_289_654_399, 7_289_654_399.0),  # 2200-12-31T23:59:59Z, the last whole second accepted
        (100_000_000_001, 100_000_000.001),  # just above 1e11: milliseconds, 1973-03-03
        (7_289_654_399_999, 7_289_654_399.999),  # the last millisecond of 2200
    ],
)
def test_numeric_timestamps_are_epoch_seconds_or_milliseconds(stamp: float, seconds: float) -> None:
    """Numbers up to 1e11 are seconds since the epoch; larger ones are milliseconds."""
    assert _time_of(stamp) == pytest.approx(seconds, abs=1e-6)


@pytest.mark.parametrize(
    "stamp",
    [
        100_000_000_000,  # exactly 1e11 is seconds: the year 5138
        99_999_999_999,  # seconds, far beyond 2200
        7_289_654_400,  # 2201-01-01T00:00:00Z in seconds
        7_289_654_400_000,  # the same in milliseconds
        -0.001,
    ],
)
def test_numeric_timestamps_outside_1970_to_2200_are_refused(stamp: float) -> None:
    """The millisecond rule never turns an out-of-range time into an accepted one."""
    assert _reason(orjson.dumps({"value": 1, "ts": stamp}), STAMPED) == "bad_timestamp"


def test_seconds_and_milliseconds_name_the_same_instant() -> None:
    """The same instant sent as seconds, as milliseconds and as RFC 3339 text decodes equally."""
    assert _time_of(1709294400) == _time_of(1709294400000) == _time_of("2024-03-01T12:00:00Z")


# ================================================================ atomic messages


def test_one_bad_reading_refuses_the_whole_batch_and_names_it() -> None:
    """A batch with one bad reading raises, naming its position; no reading of it is returned."""
    payload = b'[{"value": 1}, {"value": 2}, {"value": true}, {"value": 4}]'
    with pytest.raises(PayloadError) as caught:
        decode(payload, ARRAY, NOW)
    assert caught.value.reason == "wrong_type"
    assert caught.value.position == 2
    assert str(caught.value).startswith("reading 2: ")


def test_a_bad_column_element_names_its_position() -> None:
    """In a columns batch the error names the position of the bad element."""
    payload = b'{"value": [1, 2, 3], "ts": [1709294400, "soon", 1709294400]}'
    with pytest.raises(PayloadError) as caught:
        decode(payload, COLUMNS, NOW)
    assert (caught.value.reason, caught.value.position) == ("bad_timestamp", 1)


def test_a_refused_message_changes_nothing_for_the_next_one() -> None:
    """Decoding keeps no state: a good message decodes the same before and after a bad one."""
    good = b'[{"value": 1, "ts": 1709294400}, {"value": 2, "ts": 1709294401}]'
    mapping = PayloadMapping(format="json", timestamp="ts", batch="array")
    before = decode(good, mapping, NOW)
    for bad in (b"[", b'[{"value": 1, "ts": 1709294400}, {"value": 2}]', b"\xff"):
        with pytest.raises(PayloadError):
            decode(bad, mapping, NOW)
    assert decode(good, mapping, NOW) == before


# ================================================================ configuration


@pytest.mark.parametrize(
    "kwargs",
    [
        {"timestamp": "ts"},  # a bare number has no fields
        {"batch": "array"},
        {"value": "reading.value"},
        {"format": "xml"},
        {"format": "json", "batch": "rows"},
        {"format": "json", "value": "a..b"},
        {"format": "json", "timestamp": ""},
        {"format": "json", "value": ".a"},
        {"format": "json", "items": "data"},  # items needs batch 'array'
        {"format": "json", "batch": "columns", "value": ""},
        {"max_bytes": 0},
        {"max_depth": 2000},  # the JSON reader stops at 1024
        {"max_batch": True},
    ],
)
def test_impossible_mappings_are_configuration_errors(kwargs: dict[str, Any]) -> None:
    """A mapping that cannot be followed is refused when it is made, not when a message comes."""
    with pytest.raises(ConfigError):
        PayloadMapping(**kwargs)


def test_a_receive_time_that_is_not_finite_is_the_callers_error() -> None:
    """received_at must be finite; that is a ConfigError, never blamed on the message."""
    with pytest.raises(ConfigError):
        decode(b"8.0", NUMBER, math.nan)


# ================================================================ properties

MAPPINGS = [
    NUMBER,
    JSON,
    FULL,
    ARRAY,
    ARRAY_FULL,
    COLUMNS,
    COLUMNS_FULL,
    PayloadMapping(format="json", value=""),
    PayloadMapping(format="json", value="a.value", timestamp="a.ts"),
    PayloadMapping(format="json", batch="array", items="value"),
    PayloadMapping(format="json", max_depth=2, max_batch=3, max_bytes=64),
]


def _check_outcome(payload: bytes, mapping: PayloadMapping) -> None:
    """Decoding gives valid readings or a PayloadError with a known reason (nothing else escapes)."""
    try:
        readings = decode(payload, mapping, NOW)
    except PayloadError as error:
        reason: str | None = error.reason
    else:
        reason = None
        _check_readings(readings)
    assert reason is None or reason in PAYLOAD_REASONS


def _check_readings(readings: list[Decoded]) -> None:
    assert readings
    for position, reading in enumerate(readings):
        assert reading.position == position
        assert math.isfinite(reading.value)
        assert 0.0 <= reading.time < 7_289_654_400.0
        assert reading.exposure is None or (math.isfinite(reading.exposure) and reading.exposure > 0)
        assert reading.sequence is None or type(reading.sequence) is int
        reading.to_reading()  # the core accepts every decoded reading


@PROPERTY
@given(payload=st.binary(max_size=200), mapping=st.sampled_from(MAPPINGS))
def test_arbitrary_bytes_give_readings_or_a_payload_error(payload: bytes, mapping: PayloadMapping) -> None:
    """No byte string makes decode raise anything but PayloadError, or return a bad reading."""
    _check_outcome(payload, mapping)


KEYS = st.sampled_from(["value", "ts", "seq", "n", "a", "x"]) | st.text(max_size=4)
SCALARS = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**63), max_value=2**64 - 1)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=30)
    | st.sampled_from(["8.01", "NaN", "inf", "-1e999", "2024-03-01T12:00:00Z", "1990-12-31T23:59:60z"])
    | st.sampled_from([1709294400, 1709294400123, 1e11, 7_289_654_400])
)
JSON_VALUES = st.recursive(
    SCALARS,
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(KEYS, inner, max_size=5),
    max_leaves=30,
)


@PROPERTY
@given(document=JSON_VALUES, mapping=st.sampled_from(MAPPINGS[1:]))
def test_arbitrary_json_gives_readings_or_a_payload_error(document: object, mapping: PayloadMapping) -> None:
    """No JSON value (RFC 8259) makes decode raise anything but PayloadError, or return a bad reading."""
    _check_outcome(orjson.dumps(document), mapping)


def _depth(value: object) -> int:
    if isinstance(value, list):
        return 1 + max(map(_depth, value), default=0)
    if isinstance(value, dict):
        return 1 + max(map(_depth, value.values()), default=0)
    return 0


NESTING_TEXT = st.text(alphabet='[]{}"\\ab', max_size=8)
NESTED = st.recursive(
    st.integers(0, 9) | NESTING_TEXT,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(NESTING_TEXT, inner, max_size=4),
    max_leaves=25,
)


@PROPERTY
@given(document=NESTED)
def test_the_depth_measure_agrees_with_counting_recursively(document: object) -> None:
    """The flat scan of the JSON text finds the same depth as walking the document recursively."""
    assert _nesting(orjson.dumps(document)) == _depth(document)


FINITE = st.floats(allow_nan=False, allow_infinity=False)
READING = st.tuples(
    FINITE,
    st.integers(0, 7_289_654_399_999),  # milliseconds within 1970-2200
    st.sampled_from(["seconds", "milliseconds", "rfc3339"]),
    st.integers(-(2**63), 2**63 - 1),
    st.floats(min_value=1e-300, max_value=1e300),
)


def _stamp(milliseconds: int, form: str) -> tuple[object, float]:
    """A timestamp in the given form, and the seconds it stands for."""
    seconds = milliseconds / 1000
    if form == "seconds" or (form == "milliseconds" and milliseconds <= 1e11):
        return seconds, seconds
    if form == "milliseconds":
        return milliseconds, seconds
    moment = datetime(1970, 1, 1, tzinfo=UTC) + timedelta(milliseconds=milliseconds)
    return moment.isoformat().replace("+00:00", "Z"), moment.timestamp()


@PROPERTY
@given(readings=st.lists(READING, min_size=1, max_size=30), as_columns=st.booleans())
def test_a_generated_valid_batch_decodes_to_exactly_its_readings(
    readings: list[tuple[float, int, str, int, float]], as_columns: bool
) -> None:
    """Readings written as a batch (array or columns) come back exactly, in order."""
    stamps = [_stamp(ms, form) for _, ms, form, _, _ in readings]
    expected = [
        Decoded(value, seconds, sequence, exposure, i)
        for i, ((value, _, _, sequence, exposure), (_, seconds)) in enumerate(
            zip(readings, stamps, strict=True)
        )
    ]
    if as_columns:
        document: object = {
            "value": [r[0] for r in readings],
            "ts": [s for s, _ in stamps],
            "seq": [r[3] for r in readings],
            "n": [r[4] for r in readings],
        }
        mapping = COLUMNS_FULL
    else:
        document = [
            {"value": r[0], "ts": s, "seq": r[3], "n": r[4]}
            for r, (s, _) in zip(readings, stamps, strict=True)
        ]
        mapping = ARRAY_FULL
    assert decode(orjson.dumps(document), mapping, NOW) == expected


# ================================================================ routing

PRESS = ("press/{machine}/thickness", "plant/{machine}/thickness")


def _ids(router: Router, topic: str) -> list[str]:
    return [route.chart_id for route in router.route(topic)]


def test_placeholders_expand_into_the_chart_id() -> None:
    """A named placeholder takes the topic level it fills, and the filter subscribes with '+'."""
    router = Router([PRESS])
    assert router.filters() == ["plant/+/thickness"]
    assert router.route("plant/press-2/thickness") == [
        Route("press/{machine}/thickness", "press/press-2/thickness", "plant/+/thickness")
    ]
    assert router.rejected("plant/press-2/thickness") == []


def test_placeholders_may_sit_inside_a_chart_id_level_and_repeat() -> None:
    """Chart id templates may put placeholders anywhere, in any order, more than once."""
    router = Router([("line-{line}/{station}.{line}", "{site}/{line}/{station}/bore")])
    assert _ids(router, "north/7/s3/bore") == ["line-7/s3.7"]


def test_one_topic_feeds_every_matching_chart_in_configuration_order() -> None:
    """A topic feeds each chart whose filter it matches, in configuration order, each once."""
    router = Router(
        [
            ("plant/all", "plant/#"),
            PRESS,
            ("press/{machine}/thickness-ewma", "plant/{machine}/thickness"),
            ("width/{m}", "plant/{m}/width"),
            ("any/{m}", "+/{m}/+"),
        ]
    )
    assert router.filters() == ["plant/#", "plant/+/thickness", "plant/+/width", "+/+/+"]
    assert _ids(router, "plant/p1/thickness") == [
        "plant/all",
        "press/p1/thickness",
        "press/p1/thickness-ewma",
        "any/p1",
    ]
    assert _ids(router, "plant/p1/width") == ["plant/all", "width/p1", "any/p1"]
    assert _ids(router, "other/p1/width") == ["any/p1"]
    assert _ids(router, "plant/p1/weight/extra") == ["plant/all"]


def test_multi_level_wildcard_matches_the_parent_and_below() -> None:
    """'#' matches the parent level and any number of levels below (MQTT 3.1.1, 4.7.1.2)."""
    router = Router([("all", "plant/#"), ("one/{m}", "plant/{m}/#")])
    assert _ids(router, "plant") == ["all"]
    assert _ids(router, "plant/p1") == ["all", "one/p1"]
    assert _ids(router, "plant/p1/a/b/c") == ["all", "one/p1"]
    assert _ids(router, "plants/p1") == []


def test_single_level_wildcard_fills_exactly_one_level() -> None:
    """'+' matches one level, possibly empty, never two (MQTT 3.1.1, 4.7.1.3)."""
    router = Router([("fixed", "plant/+/thickness")])
    assert _ids(router, "plant/p1/thickness") == ["fixed"]
    assert _ids(router, "plant//thickness") == ["fixed"]
    assert _ids(router, "plant/p1/x/thickness") == []


def test_dollar_topics_are_not_matched_by_leading_wildcards() -> None:
    """Topics starting with '$' match no filter starting with a wildcard (MQTT 3.1.1, 4.7.2)."""
    router = Router([("all", "#"), ("sys/{name}", "{name}/monitor/Clients")])
    assert router.resolve("$SYS/monitor/Clients").routes == ()
    assert router.resolve("$SYS/monitor/Clients").rejected == ()
    assert _ids(router, "broker/monitor/Clients") == ["all", "sys/broker"]


@pytest.mark.parametrize(
    ("level", "reason"),
    [
        ("", "unsafe_value"),  # an empty level
        ("press 2", "unsafe_value"),
        ("press+2", "unsafe_value"),
        ("press#2", "unsafe_value"),
        ("pr\u00e9ss", "unsafe_value"),  # letters outside ASCII
        ("press%2F2", "unsafe_value"),
        ("press\x002", "unsafe_value"),
        ("{x}", "unsafe_value"),
        ("..", "invalid_chart_id"),  # a level may not start with '.'
        (".hidden", "invalid_chart_id"),
        ("-2", "invalid_chart_id"),
        ("_2", "invalid_chart_id"),
        ("x" * 200, "invalid_chart_id"),  # the id would exceed 200 characters
    ],
)
def test_unsafe_placeholder_values_are_refused_with_a_reason(level: str, reason: str) -> None:
    """A value that could not make a safe chart id gives no route and a rejection saying why."""
    router = Router([PRESS])
    topic = f"plant/{level}/thickness"
    assert router.route(topic) == []
    (rejection,) = router.rejected(topic)
    assert rejection.reason == reason
    assert rejection.template_id == PRESS[0]
    assert rejection.topic_filter == "plant/+/thickness"
    assert rejection.detail


def test_a_topic_level_with_a_slash_is_never_one_value() -> None:
    """'/' always separates topic levels, so it can never reach a chart id as part of a value."""
    router = Router([PRESS])
    assert router.route("plant/press/2/thickness") == []
    assert router.rejected("plant/press/2/thickness") == []


def test_unused_placeholders_are_not_checked() -> None:
    """Only the values a chart id uses must be safe; other placeholders only match."""
    router = Router([("press/{machine}", "{site}/{machine}")])
    assert _ids(router, "north site!/p1") == ["press/p1"]


def test_an_expansion_may_not_take_a_configured_static_id() -> None:
    """A template never produces the id of a static chart: the static chart keeps its readings."""
    router = Router([PRESS, ("press/special/thickness", "legacy/special")])
    assert router.route("plant/special/thickness") == []
    (rejection,) = router.rejected("plant/special/thickness")
    assert rejection.reason == "shared_chart_id"
    assert "press/special/thickness" in rejection.detail
    assert _ids(router, "legacy/special") == ["press/special/thickness"]
    assert _ids(router, "plant/p1/thickness") == ["press/p1/thickness"]


def test_two_templates_never_share_a_chart_id() -> None:
    """An id two templates could both produce is refused to both; others pass."""
    router = Router([("line-{a}/x", "a/{a}"), ("{b}-7/x", "b/{b}")])
    assert router.route("a/7") == []  # line-7/x could also be {b}='line'
    assert [r.reason for r in router.rejected("a/7")] == ["shared_chart_id"]
    assert router.route("b/line") == []
    assert _ids(router, "a/8") == ["line-8/x"]
    assert _ids(router, "b/press") == ["press-7/x"]


IDENTIFIERS = st.text(alphabet="abcAB09._-/+#{}$ é", max_size=12)


@PROPERTY
@given(pieces=st.lists(IDENTIFIERS, min_size=1, max_size=5))
def test_expanded_ids_stay_in_their_namespace(pieces: list[str]) -> None:
    """Whatever the topic, an expanded id keeps the template's fixed levels and is a valid chart id."""
    router = Router(
        [
            ("press/{m}/thickness", "plant/{m}/thickness"),
            ("press/special/thickness", "legacy/special"),
            ("line/{a}-{b}", "{a}/{b}/#"),
        ]
    )
    topic = "/".join(pieces)
    levels = topic.split("/")
    for route in router.route(topic):
        assert re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._-]*(/[A-Za-z0-9][A-Za-z0-9._-]*)*", route.chart_id)
        assert len(route.chart_id) <= 200
        if route.template_id == "press/{m}/thickness":
            assert route.chart_id == f"press/{levels[1]}/thickness"
            assert route.chart_id != "press/special/thickness"
        elif route.template_id == "line/{a}-{b}":
            assert route.chart_id == f"line/{levels[0]}-{levels[1]}"
    routed = {route.template_id for route in router.route(topic)}
    refused = {rejection.template_id for rejection in router.rejected(topic)}
    assert not routed & refused


FILTER_LEVELS = st.sampled_from(["a", "b", "", "+", "$s"])
TOPIC_LEVELS = st.sampled_from(["a", "b", "", "$s", "c"])


@st.composite
def topic_filters(draw: st.DrawFn) -> str:
    levels = draw(st.lists(FILTER_LEVELS, min_size=1, max_size=4))
    if draw(st.booleans()):
        levels.append("#")
    return "/".join(levels) or "a"  # a filter has at least one character (MQTT 3.1.1, 4.7.3)


@PROPERTY
@given(
    filters=st.lists(topic_filters(), min_size=1, max_size=6),
    topics=st.lists(st.lists(TOPIC_LEVELS, min_size=1, max_size=5).map("/".join), max_size=10),
    named=st.booleans(),
)
def test_routing_agrees_with_topic_matching(filters: list[str], topics: list[str], named: bool) -> None:
    """A topic reaches a chart (route or rejection) exactly when monitor.topics.matches says it matches."""
    charts = []
    for i, topic_filter in enumerate(filters):
        if named:  # every '+' becomes a named placeholder the chart id uses
            levels = topic_filter.split("/")
            names = [f"p{j}" for j, level in enumerate(levels) if level == "+"]
            template = "/".join(f"{{p{j}}}" if level == "+" else level for j, level in enumerate(levels))
            charts.append(("/".join([f"c{i}", *(f"{{{n}}}" for n in names)]), template))
        else:
            charts.append((f"c{i}", topic_filter))
    router = Router(charts, cache_size=4)
    assert router.filters() == list(dict.fromkeys(filters))
    for topic in topics * 2:  # the second round is served partly from the cache
        routing = router.resolve(topic)
        reached = [r.template_id for r in routing.routes] + [r.template_id for r in routing.rejected]
        expected = [template for template, f in zip(charts, filters, strict=True) if matches(f, topic)]
        assert sorted(reached) == sorted(t for t, _ in expected)
        for route in routing.routes:
            assert route.topic_filter == filters[int(route.template_id.split("/")[0][1:])]


def test_the_cache_is_bounded_and_forgets_the_least_recently_used_topic() -> None:
    """The per-topic cache never holds more than its capacity and evicts the least recently used."""
    router = Router([PRESS], cache_size=3)
    first = {f"plant/p{i}/thickness": router.route(f"plant/p{i}/thickness") for i in range(10)}
    info = router.cache_info()
    assert (info.size, info.capacity, info.misses, info.hits) == (3, 3, 10, 0)
    # p7, p8, p9 are cached; using p7 makes p8 the least recently used
    router.route("plant/p7/thickness")
    router.route("plant/p10/thickness")
    assert router.cache_info().hits == 1
    router.route("plant/p9/thickness")
    router.route("plant/p7/thickness")
    assert router.cache_info().hits == 3
    router.route("plant/p8/thickness")  # evicted: computed again
    assert router.cache_info().misses == 12
    for topic, routes in first.items():  # eviction never changes an answer
        assert router.route(topic) == routes
    assert router.cache_info().size == 3


def test_a_zero_cache_still_routes() -> None:
    """With cache_size=0 nothing is remembered and every answer is still right."""
    router = Router([PRESS], cache_size=0)
    assert _ids(router, "plant/p1/thickness") == _ids(router, "plant/p1/thickness") == ["press/p1/thickness"]
    assert router.cache_info().size == 0


def test_very_long_topics_are_routed_but_not_cached() -> None:
    """Topics longer than 1024 characters are answered but kept out of the cache."""
    router = Router([("all", "#")])
    topic = "a/" * 600
    assert _ids(router, topic) == ["all"]
    assert router.cache_info().size == 0


def test_returned_lists_do_not_alter_the_cache() -> None:
    """Changing a returned list does not change what the router answers next time."""
    router = Router([PRESS])
    routes = router.route("plant/p1/thickness")
    routes.clear()
    assert _ids(router, "plant/p1/thickness") == ["press/p1/thickness"]


def test_rejections_are_plain_values() -> None:
    """A Rejection is a frozen value naming the template, the filter, a reason code and a sentence."""
    (rejection,) = Router([PRESS]).rejected("plant/a b/thickness")
    assert rejection == Rejection(PRESS[0], "plant/+/thickness", "unsafe_value", rejection.detail)
    assert "'a b'" in rejection.detail


@pytest.mark.parametrize(
    ("charts", "words"),
    [
        ([("press/{machine}", "plant/+/thickness")], ["press/{machine}", "plant/+/thickness", "machine"]),
        ([("press/{m}", "plant/{machine}")], ["press/{m}", "plant/{machine}"]),
        ([("press/x", "plant/press-{n}")], ["press-{n}"]),
        ([("press/x", "plant/{n}/{n}")], ["twice"]),
        ([("press/x", "plant/#/x")], ["'#'"]),
        ([("press/x", "plant/a+")], ["'+'"]),
        ([("press/x", "")], ["topic template"]),
        ([("press/x", "a\x00b")], ["NUL"]),
        ([("press/{m", "plant/{m}")], ["press/{m"]),
        ([("press/m}", "plant/{m}")], ["press/m}"]),
        ([("press/{}", "plant/{m}")], ["press/{}"]),
        ([("press//x", "plant/x")], ["press//x"]),
        ([("/press", "plant/x")], ["/press"]),
        ([("press/{m}/x", "a/{m}"), ("press/{m}/x", "b/{m}")], ["more than once"]),
        ([("a", "x"), ("a", "y")], ["more than once"]),
        ([("p/{a}", "x/{a}"), ("p/{b}", "y/{b}")], ["p/{a}", "p/{b}"]),
    ],
)
def test_bad_templates_are_configuration_errors_naming_them(
    charts: list[tuple[str, str]], words: list[str]
) -> None:
    """Malformed, mismatched or colliding templates raise ConfigError with the offending text."""
    with pytest.raises(ConfigError) as caught:
        Router(charts)
    for word in words:
        assert word in str(caught.value)


def test_templates_with_different_placeholder_patterns_may_coexist() -> None:
    """'p/{a}-{a}' and 'p/{a}-{b}' make different ids, so both are allowed; shared ids are refused."""
    router = Router([("p/{a}-{a}", "x/{a}"), ("p/{a}-{b}", "y/{a}/{b}")])
    assert _ids(router, "x/7") == []  # p/7-7 could also come from the second template
    assert _ids(router, "y/7/8") == ["p/7-8"]


# ---------------------------------------------------------------- the batch path as arrays


def _decoded(columns: Columns) -> list[Decoded]:
    """The columns as the Decoded tuples decode returns."""
    count = len(columns)
    sequences = [None] * count if columns.sequences is None else [int(s) for s in columns.sequences.tolist()]
    exposures = [None] * count if columns.exposures is None else columns.exposures.tolist()
    rows = zip(columns.values.tolist(), columns.times.tolist(), sequences, exposures, strict=True)
    return [Decoded(v, t, s, e, position) for position, (v, t, s, e) in enumerate(rows)]


def _outcome(read: Any, payload: bytes, mapping: PayloadMapping) -> tuple[str, object]:
    try:
        result = read(payload, mapping, NOW)
    except PayloadError as error:
        return "refused", (error.reason, error.position, str(error))
    columns = result if isinstance(result, Columns) else Columns.of(result, mapping)
    return "read", _decoded(columns)


def _same_as_decode(payload: bytes, mapping: PayloadMapping) -> None:
    """decode_columns reads exactly what decode reads, and refuses with the same reason and words."""
    expected = _outcome(decode, payload, mapping)
    assert _outcome(decode_columns, payload, mapping) == expected
    if expected[0] == "read":  # and Columns round-trips decode's readings
        assert _decoded(Columns.of(decode(payload, mapping, NOW), mapping)) == decode(payload, mapping, NOW)


FIELD_VALUES = (
    st.floats(allow_nan=False, allow_infinity=False)
    | st.integers(min_value=-(2**63), max_value=2**64 - 1)  # what JSON text orjson reads
    | st.sampled_from([8.01, 1709294400, 1709294400123, 1e11, 7_289_654_400, 2**53, 2**53 + 1, 0, -1])
    | SCALARS
)
READING = st.fixed_dictionaries(
    {}, optional={"value": FIELD_VALUES, "ts": FIELD_VALUES, "seq": FIELD_VALUES, "n": FIELD_VALUES}
)
TIDY_READING = st.fixed_dictionaries(
    {
        "value": st.floats(-1e6, 1e6) | st.integers(-1000, 1000),
        "ts": st.floats(1e9, 2e9) | st.integers(1_500_000_000_000, 1_800_000_000_000),
        "seq": st.integers(-(2**63), 2**63 - 1),
        "n": st.floats(0.5, 100) | st.integers(1, 100),
    }
)
BATCH_MAPPINGS = [
    ARRAY,
    ARRAY_FULL,
    COLUMNS,
    COLUMNS_FULL,
    PayloadMapping(format="json", batch="array", items="r", max_batch=3),
]


@PROPERTY
@given(
    readings=st.lists(TIDY_READING | READING, max_size=6),
    mapping=st.sampled_from(BATCH_MAPPINGS),
    bare=st.booleans(),
)
def test_batches_read_as_arrays_are_the_readings_decode_reads(
    readings: list[dict[str, object]], mapping: PayloadMapping, bare: bool
) -> None:
    """Arrays, columns, bare values: the array path gives decode's readings or decode's refusal."""
    if mapping.batch == "columns":
        document: object = {key: [r.get(key) for r in readings] for key in ("value", "ts", "seq", "n")}
    elif bare:
        document = [r.get("value") for r in readings]
    else:
        document = readings
    if mapping.items:
        document = {mapping.items: document}
    _same_as_decode(orjson.dumps(document), mapping)


@PROPERTY
@given(document=JSON_VALUES, mapping=st.sampled_from(MAPPINGS))
def test_any_json_read_as_arrays_is_what_decode_reads(document: object, mapping: PayloadMapping) -> None:
    _same_as_decode(orjson.dumps(document), mapping)


def test_array_batches_of_plain_numbers_become_arrays(monkeypatch: pytest.MonkeyPatch) -> None:
    """The common batch: every field a plain number; milliseconds become seconds (read as
    columns, without the reading-by-reading path)."""

    def not_here(*args: object) -> None:
        raise AssertionError("the reading-by-reading path was taken")

    monkeypatch.setattr(ingest, "_readings", not_here)
    payload = b'[{"value": 8, "ts": 1709294400500, "seq": 1, "n": 2}, {"value": 8.5, "ts": 1709294401, "seq": 2, "n": 3.5}]'
    columns = decode_columns(payload, ARRAY_FULL, NOW)
    assert columns.values.tolist() == [8.0, 8.5]
    assert columns.times.tolist() == [1709294400.5, 1709294401.0]
    assert columns.sequences is not None
    assert columns.sequences.tolist() == [1, 2]
    assert columns.exposures is not None
    assert columns.exposures.tolist() == [2.0, 3.5]
    assert len(decode_columns(b'{"value": [1, 2, 3], "ts": [1, 2, 3]}', COLUMNS, NOW)) == 3
