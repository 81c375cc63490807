"""From MQTT messages to readings: payload decoding and topic routing, as pure code.

Bytes and topic strings come in; readings and chart ids go out. Nothing here reads a clock,
touches the network or logs: the receive time is passed in, and every refusal comes back as
data (a :class:`PayloadError` with a stable ``reason`` code, or a :class:`Rejection`) for the
caller to count and log.

* :func:`decode` turns one message payload into readings, as a :class:`PayloadMapping` says:
  a bare number, or JSON (RFC 8259) with dotted paths to the value, timestamp, sequence number
  and exposure, one reading per message or a batch (an array of readings, or parallel columns).
  A message is decoded whole or refused whole: one bad reading refuses its message, so a
  message is never half-counted, and nothing is kept between calls.
* :class:`Router` maps a topic to the charts it feeds. Topic templates may name single-level
  placeholders (``plant/{machine}/thickness``) that chart id templates reuse
  (``press/{machine}/thickness``); placeholder values that would not make a safe chart id are
  refused, never cleaned up.

Examples:
    >>> decode(b" 8.01 ", PayloadMapping(), received_at=1_700_000_000.0)
    [Decoded(value=8.01, time=1700000000.0, sequence=None, exposure=None, position=0)]
    >>> router = Router([("press/{machine}/thickness", "plant/{machine}/thickness")])
    >>> router.filters()
    ['plant/+/thickness']
    >>> [r.chart_id for r in router.route("plant/press-2/thickness")]
    ['press/press-2/thickness']
"""

from __future__ import annotations

import dataclasses
import math
import operator
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import lru_cache
from typing import Any, Literal, NamedTuple, TypeAlias, TypeVar, get_args

import numpy as np
import orjson
from numpy.typing import NDArray

from monitor.spc.errors import ConfigError, ReadingError
from monitor.spc.subgroups import Reading
from monitor.topics import CHART_ID_MAX, is_chart_id, matches

__all__ = [
    "PAYLOAD_REASONS",
    "REJECTION_REASONS",
    "CacheInfo",
    "Columns",
    "Decoded",
    "PayloadError",
    "PayloadMapping",
    "PayloadReason",
    "Rejection",
    "RejectionReason",
    "Route",
    "Router",
    "Routing",
    "decode",
    "decode_columns",
]

# ================================================================ payload decoding

PayloadReason: TypeAlias = Literal[
    "not_utf8",
    "not_json",
    "not_a_number",
    "not_finite",
    "not_positive",
    "missing_field",
    "wrong_type",
    "too_large",
    "too_deep",
    "empty_batch",
    "bad_timestamp",
    "batch_too_long",
    "mismatched_columns",
]
PAYLOAD_REASONS: tuple[PayloadReason, ...] = get_args(PayloadReason)
"""Every ``PayloadError.reason``, for counters that should exist before the first refusal."""


class PayloadError(ReadingError):
    """A message payload cannot be read; nothing of the message was used.

    Args:
        reason: a stable snake_case code for counters and logs (one of :data:`PAYLOAD_REASONS`).
        detail: what is wrong, as a sentence.
        position: index of the offending reading in a batch; None when the message as a whole
            is at fault.

    Examples:
        >>> error = PayloadError("missing_field", "field 'value' is missing", position=3)
        >>> error.reason, str(error)
        ('missing_field', "reading 3: field 'value' is missing")
    """

    def __init__(self, reason: PayloadReason, detail: str, *, position: int | None = None) -> None:
        self.reason: PayloadReason = reason
        self.detail = detail
        self.position = position
        super().__init__(detail if position is None else f"reading {position}: {detail}")


@dataclass(frozen=True, slots=True)
class PayloadMapping:
    """Where the readings are in a message payload.

    Paths are dotted object keys into the JSON document (``"reading.value"``); a ``value`` or
    ``items`` path of ``""`` is the document (or, in an array batch, the array element)
    itself. Keys containing a dot cannot be addressed. Every configured path must be present
    in every reading: a missing timestamp is an error, not a silent fall-back to the receive time.

    Args:
        format: ``"number"``: the payload is one decimal number in ASCII, optionally surrounded
            by whitespace, read at the receive time. ``"json"``: a JSON document.
        value: path to the measured value.
        timestamp: path to the event time; None uses the receive time.
        sequence: path to an integer sequence number of the reading.
        exposure: path to the units inspected (attribute charts).
        batch: ``"none"``: one reading per message. ``"array"``: a JSON array (the document,
            or the array at ``items``) of objects mapped as above, or of bare values.
            ``"columns"``: an object of parallel arrays; the paths name the arrays.
        items: path to the array of an ``"array"`` batch.
        max_bytes: largest payload read, in bytes (checked before parsing).
        max_depth: deepest nesting of JSON arrays and objects (``[1]`` has depth 1), at most 1024.
        max_batch: most readings in one message.

    Examples:
        >>> PayloadMapping(format="json", value="reading.value", timestamp="ts")
        PayloadMapping(format='json', value='reading.value', timestamp='ts', ...)
        >>> PayloadMapping(timestamp="ts")
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: a 'number' payload is only a value; ...
    """

    format: Literal["number", "json"] = "number"
    value: str = "value"
    timestamp: str | None = None
    sequence: str | None = None
    exposure: str | None = None
    batch: Literal["none", "array", "columns"] = "none"
    items: str = ""
    max_bytes: int = 1_000_000
    max_depth: int = 32
    max_batch: int = 100_000
    _hash: int = dataclasses.field(default=0, init=False, repr=False, compare=False)

    def __hash__(self) -> int:
        """Computed once: a mapping is looked up for every message."""
        return self._hash

    def __post_init__(self) -> None:
        settings = (self.format, self.value, self.timestamp, self.sequence, self.exposure, self.batch)
        limits = (self.items, self.max_bytes, self.max_depth, self.max_batch)
        object.__setattr__(self, "_hash", hash((*settings, *limits)))
        if self.format not in ("number", "json"):
            raise ConfigError(f"payload format must be 'number' or 'json', got {self.format!r}")
        if self.batch not in ("none", "array", "columns"):
            raise ConfigError(f"payload batch must be 'none', 'array' or 'columns', got {self.batch!r}")
        for name, limit, most in (
            ("max_bytes", self.max_bytes, 2**31),
            ("max_depth", self.max_depth, _ORJSON_MAX_DEPTH),
            ("max_batch", self.max_batch, 2**31),
        ):
            if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= most:
                raise ConfigError(f"payload {name} must be an integer from 1 to {most}, got {limit!r}")
        paths = {"value": self.value, "items": self.items}
        paths.update(
            (name, path)
            for name, path in (
                ("timestamp", self.timestamp),
                ("sequence", self.sequence),
                ("exposure", self.exposure),
            )
            if path is not None
        )
        for name, path in paths.items():
            whole = name in ("value", "items")  # only these may be the document itself
            if not isinstance(path, str) or ((path or not whole) and "" in path.split(".")):
                allowed = "'' or dotted keys" if whole else "dotted keys"
                raise ConfigError(f"payload {name} path must be {allowed} like 'reading.ts', got {path!r}")
        if self.format == "number" and (
            len(paths) > 2 or self.batch != "none" or self.items or self.value != "value"
        ):
            raise ConfigError(
                "a 'number' payload is only a value; timestamp, sequence, exposure, batch, items "
                "and value paths need format 'json'"
            )
        if self.items and self.batch != "array":
            raise ConfigError(f"payload items path {self.items!r} needs batch 'array'")
        if self.batch == "columns" and "" in (path for name, path in paths.items() if name != "items"):
            raise ConfigError("a 'columns' batch names each column: paths cannot be ''")


class Decoded(NamedTuple):
    """One reading taken from a message (a named tuple: one is made per reading, so it is cheap).

    Args:
        value: the measured value (finite).
        time: event time in seconds since the epoch, UTC (the receive time if not mapped).
        sequence: the reading's sequence number, if mapped.
        exposure: units inspected (attribute charts), if mapped; positive.
        position: index of the reading within its message (0 for single readings).

    Examples:
        >>> Decoded(2.0, 60.0, None, 40.0, 0).to_reading()
        Reading(value=2.0, time=60.0, exposure=40.0)
    """

    value: float
    time: float
    sequence: int | None
    exposure: float | None
    position: int

    def to_reading(self) -> Reading:
        """The reading for the statistical core."""
        return Reading(self.value, self.time, self.exposure)


def decode(payload: bytes, mapping: PayloadMapping, received_at: float) -> list[Decoded]:
    """The readings of one message, in message order; all of them, or a :class:`PayloadError`.

    Numbers: JSON numbers, and strings holding a decimal number (``"8.01"``, the same text
    the ``"number"`` format reads); never booleans, null, ``NaN`` or infinities.
    Timestamps: strings are ISO 8601 / RFC 3339 (``Z`` or an offset; without one, UTC; a
    leap second ``:60`` counts as the next second); numbers are seconds since the epoch, or
    milliseconds when larger than 1e11 (1e11 s is in the year 5138, 1e11 ms in 1973, so the
    two ranges cannot be confused between 1973 and 2200). Times outside the years 1970 to 2200
    are refused. Sequence numbers are integers (``5.0`` is 5; ``5.5``, ``true`` and strings
    are refused). Exposures are positive finite numbers.

    A leading UTF-8 byte order mark is ignored (RFC 8259 section 8.1 allows it).

    Args:
        payload: the message body.
        mapping: where the readings are.
        received_at: when the message arrived, in seconds since the epoch (finite); the time
            of readings without a mapped timestamp.

    Raises:
        PayloadError: the message cannot be read; ``reason`` says why, ``position`` which
            reading of a batch.
        ConfigError: ``received_at`` is not finite (a fault of the caller, not the message).

    Examples:
        >>> mapping = PayloadMapping(format="json", timestamp="ts", batch="array")
        >>> decode(b'[{"value": 8.01, "ts": "2024-03-01T12:00:00Z"}, {"value": "8.02", "ts": 1709294401000}]',
        ...        mapping, received_at=0.0)  # doctest: +NORMALIZE_WHITESPACE
        [Decoded(value=8.01, time=1709294400.0, sequence=None, exposure=None, position=0),
         Decoded(value=8.02, time=1709294401.0, sequence=None, exposure=None, position=1)]
        >>> decode(b'{"value": [8.0, 8.1], "ts": [1709294400]}', PayloadMapping(format="json",
        ...        timestamp="ts", batch="columns"), received_at=0.0)
        Traceback (most recent call last):
        ...
        monitor.ingest.PayloadError: columns have different lengths: 'value' 2, 'ts' 1
        >>> decode(b"NaN", PayloadMapping(), received_at=0.0)
        Traceback (most recent call last):
        ...
        monitor.ingest.PayloadError: the message is not finite: 'NaN'
    """
    payload = _checked(payload, mapping, received_at)
    if mapping.format == "number":
        try:
            text = bytes(payload).decode("utf-8")
        except UnicodeDecodeError as error:
            raise PayloadError("not_utf8", f"the message is not UTF-8 text ({error.reason})") from None
        return [Decoded(_number_text(text, "the message"), received_at, None, None, 0)]

    document = _parse_json(payload, mapping.max_depth)
    return _readings(document, _plan(mapping), mapping, received_at)


@dataclass(frozen=True, slots=True)
class Columns:
    """The readings of one message as arrays, one per field (no object per reading).

    ``sequences`` is None when the mapping has no sequence number; its dtype is ``object``
    only for numbers beyond 64 bits. ``exposures`` is None when the mapping has no exposure.
    """

    values: NDArray[np.float64]
    times: NDArray[np.float64]
    sequences: NDArray[Any] | None
    exposures: NDArray[np.float64] | None

    def __len__(self) -> int:
        """Number of readings."""
        return int(self.values.shape[0])

    @classmethod
    def of(cls, readings: Sequence[Decoded], mapping: PayloadMapping) -> Columns:
        """The columns of decoded readings (fields the mapping does not name stay None)."""
        sequences = None
        if mapping.sequence is not None:
            try:
                sequences = np.array([r.sequence for r in readings], dtype=np.int64)
            except OverflowError:
                sequences = np.array([r.sequence for r in readings], dtype=object)
        return cls(
            np.array([r.value for r in readings], dtype=np.float64),
            np.array([r.time for r in readings], dtype=np.float64),
            sequences,
            None if mapping.exposure is None else np.array([r.exposure for r in readings], dtype=np.float64),
        )


def decode_columns(payload: bytes, mapping: PayloadMapping, received_at: float) -> Columns:
    """:func:`decode` for batches, as arrays: the same readings, the same refusals.

    A batch whose fields are plain JSON numbers at one key each (the common case) is read
    column by column into arrays; anything else (strings, ISO times, nested paths, a bad
    reading) goes through :func:`decode`, which also names the reading at fault.

    Examples:
        >>> mapping = PayloadMapping(format="json", timestamp="ts", sequence="seq", batch="array")
        >>> columns = decode_columns(b'[{"value": 8.01, "ts": 1709294400000, "seq": 7},'
        ...                          b' {"value": 8.02, "ts": 1709294401000, "seq": 8}]', mapping, 0.0)
        >>> columns.values.tolist(), columns.times.tolist(), columns.sequences.tolist()
        ([8.01, 8.02], [1709294400.0, 1709294401.0], [7, 8])
        >>> decode_columns(b'[{"value": 8.01, "ts": true, "seq": 7}]', mapping, 0.0)
        Traceback (most recent call last):
        ...
        monitor.ingest.PayloadError: reading 0: field 'ts' is true, expected an ISO 8601 time or epoch seconds
    """
    if mapping.format != "json" or mapping.batch == "none":
        return Columns.of(decode(payload, mapping, received_at), mapping)
    payload = _checked(payload, mapping, received_at)
    document = _loads(payload, mapping.max_depth)
    plan = _plan(mapping)
    raw = _raw_columns(document, plan, mapping)  # (only for documents two levels deep)
    if raw is not None:
        fast = _fast_columns(raw, received_at)
        if fast is not None:
            return fast
    _check_depth(document, payload, mapping.max_depth)
    return Columns.of(_readings(document, plan, mapping, received_at), mapping)


def _checked(payload: bytes, mapping: PayloadMapping, received_at: float) -> bytes:
    """The payload without a byte order mark, after the checks every message gets."""
    if not math.isfinite(received_at):
        raise ConfigError(f"received_at must be a finite number of seconds, got {received_at!r}")
    if len(payload) > mapping.max_bytes:
        raise PayloadError(
            "too_large", f"the message has {len(payload)} bytes, more than the {mapping.max_bytes} allowed"
        )
    return payload[3:] if payload[:3] == _BOM else payload


def _readings(document: object, plan: _Plan, mapping: PayloadMapping, received_at: float) -> list[Decoded]:
    if mapping.batch == "none":
        return [_mapped(document, plan, received_at, 0, "the message")]
    if mapping.batch == "array":
        return _array(document, plan, mapping, received_at)
    return _columns(document, plan, mapping, received_at)


_RawColumns: TypeAlias = tuple[list[object], list[object] | None, list[object] | None, list[object] | None]


def _raw_columns(document: object, plan: _Plan, mapping: PayloadMapping) -> _RawColumns | None:
    """The JSON values of each field as lists, or None.

    None unless every field is one key and the document holds nothing else: it is then two
    levels deep at most, within any ``max_depth`` but 1, and needs no scan of its nesting.
    """
    keys = plan.flat
    if keys is None or mapping.max_depth < 2 or plan.items.keys:
        return None
    named = sum(key is not None for key in keys)
    columns: list[list[object] | None]
    if mapping.batch == "columns":
        if type(document) is not dict or len(document) != named:
            return None
        columns = []
        for key in keys:
            column = None if key is None else document.get(key)
            if key is not None and type(column) is not list:
                return None
            columns.append(column)
        if len({len(c) for c in columns if c is not None}) != 1:
            return None
    else:
        items = document
        if type(items) is not list or not items:
            return None
        if named == 1 and set(map(type, items)) <= _NUMBER_TYPES:
            columns = [items, None, None, None]  # bare numbers
        else:
            present = [key for key in keys if key is not None]
            try:
                rows = list(map(operator.itemgetter(*present), items))
                if sum(map(len, items)) != named * len(items):  # other fields in some readings
                    return None
            except (KeyError, TypeError):  # not objects, or a field missing
                return None
            found = iter(zip(*rows, strict=True) if named > 1 else [rows])
            columns = [None if key is None else list(next(found)) for key in keys]
    values = columns[0]
    if values is None or not 1 <= len(values) <= mapping.max_batch:
        return None
    return values, columns[1], columns[2], columns[3]


def _fast_columns(raw: _RawColumns, received_at: float) -> Columns | None:
    """Arrays of plain JSON numbers, when each is acceptable as it is.

    None sends the batch through :func:`decode`, which refuses it or reads strings and other forms.
    """
    value_list, time_list, sequence_list, exposure_list = raw
    values = _plain_floats(value_list)
    if values is None:
        return None
    if time_list is None:
        times = np.full(values.shape[0], received_at)
    else:
        stamps = _plain_floats(time_list)
        if stamps is None:
            return None
        times = np.where(stamps > _MILLISECONDS_ABOVE, stamps / 1000.0, stamps)
        if not ((times >= _EARLIEST) & (times < _LATEST)).all():
            return None
    sequences = None
    if sequence_list is not None:
        if set(map(type, sequence_list)) != {int}:
            return None
        try:
            sequences = np.array(sequence_list, dtype=np.int64)
        except OverflowError:
            return None
    exposures = None
    if exposure_list is not None:
        exposures = _plain_floats(exposure_list)
        if exposures is None or not (exposures > 0.0).all():
            return None
    return Columns(values, times, sequences, exposures)


def _plain_floats(raw: list[object]) -> NDArray[np.float64] | None:
    """A list of JSON numbers (not booleans, within 2**53) as finite floats; None otherwise."""
    kinds = set(map(type, raw))
    if not kinds <= _NUMBER_TYPES:
        return None
    try:
        array = np.array(raw, dtype=np.float64)
    except OverflowError:
        return None
    if not np.isfinite(array).all() or (int in kinds and (np.abs(array) > _BIGGEST).any()):
        return None
    return array


# ---------------------------------------------------------------- JSON and its limits

_T = TypeVar("_T")

_BOM = b"\xef\xbb\xbf"
_ORJSON_MAX_DEPTH = 1024  # orjson refuses deeper documents ("depth limit exceeded")
_STRUCTURE = b'[]{}"'
_NOT_STRUCTURE = bytes(b for b in range(256) if b not in _STRUCTURE)
_NESTING_STEP = np.zeros(256, dtype=np.int64)
_NESTING_STEP[list(b"[{")] = 1
_NESTING_STEP[list(b"]}")] = -1


def _parse_json(payload: bytes, max_depth: int) -> object:
    """One parse of the whole message, errors mapped to reasons."""
    document = _loads(payload, max_depth)
    _check_depth(document, payload, max_depth)
    return document


def _loads(payload: bytes, max_depth: int) -> object:
    """The parsed document (``max_depth`` is not checked here, only named in errors)."""
    try:
        document: object = orjson.loads(payload)
    except orjson.JSONDecodeError as error:
        try:
            bytes(payload).decode("utf-8")
        except UnicodeDecodeError as bad:
            raise PayloadError("not_utf8", f"the message is not UTF-8 text ({bad.reason})") from None
        message = str(error)
        if message.startswith("depth limit exceeded"):
            raise PayloadError(
                "too_deep", f"the message nests arrays and objects deeper than {max_depth} levels"
            ) from None
        if message.startswith("number is infinity"):
            raise PayloadError(
                "not_finite", f"the message holds a number too large for a float ({message})"
            ) from None
        raise PayloadError("not_json", f"the message is not JSON (RFC 8259): {message}") from None
    return document


def _check_depth(document: object, payload: bytes, max_depth: int) -> None:
    if (
        isinstance(document, list | dict)
        and payload.count(b"[") + payload.count(b"{") > max_depth
        and _nesting(payload) > max_depth
    ):
        raise PayloadError("too_deep", f"the message nests arrays and objects deeper than {max_depth} levels")


def _nesting(text: bytes) -> int:
    r"""Deepest nesting of arrays and objects in valid JSON text, without recursion.

    Escape pairs are removed first (``\\`` then ``\"``, left to right, as a JSON reader
    pairs them), so every remaining quote opens or closes a string; brackets inside strings
    are then masked by quote parity, and the running sum of the rest is the depth.

    Examples:
        >>> _nesting(rb'{"a": [1, {"b": "]]}}"}], "c\\\"[": [[[]]]}')
        4
    """
    kept = bytes(text).replace(b"\\\\", b"").replace(b'\\"', b"").translate(None, _NOT_STRUCTURE)
    marks = np.frombuffer(kept, dtype=np.uint8)
    if marks.size == 0:
        return 0
    in_string = (np.cumsum(marks == ord('"')) & 1).astype(bool)
    steps = np.where(in_string, 0, _NESTING_STEP[marks])
    return max(0, int(np.cumsum(steps).max()))


# ---------------------------------------------------------------- mapping plans


@dataclass(frozen=True, slots=True)
class _Field:
    keys: tuple[str, ...]
    path: str
    name: str  # how messages name it: "field 'ts'"


@dataclass(frozen=True, slots=True)
class _Plan:
    value: _Field
    timestamp: _Field | None
    sequence: _Field | None
    exposure: _Field | None
    items: _Field
    flat: tuple[str, str | None, str | None, str | None] | None
    """The keys of value, timestamp, sequence and exposure when each is one key of the reading."""

    def extras(self) -> list[_Field]:
        return [f for f in (self.timestamp, self.sequence, self.exposure) if f is not None]


def _field(path: str) -> _Field:
    return _Field(tuple(path.split(".")) if path else (), path, f"field {path!r}")


@lru_cache(maxsize=256)
def _plan(mapping: PayloadMapping) -> _Plan:
    """The mapping's paths split once, not once per message."""
    value = _field(mapping.value)
    timestamp = None if mapping.timestamp is None else _field(mapping.timestamp)
    sequence = None if mapping.sequence is None else _field(mapping.sequence)
    exposure = None if mapping.exposure is None else _field(mapping.exposure)
    fields = (value, timestamp, sequence, exposure)
    flat = None
    if all(f is None or len(f.keys) == 1 for f in fields):
        flat = (value.keys[0], *(None if f is None else f.keys[0] for f in fields[1:]))
    return _Plan(value, timestamp, sequence, exposure, _field(mapping.items), flat)  # type: ignore[arg-type]


def _lookup(node: object, field: _Field, root: str) -> object:
    """The value at ``field`` below ``node`` (named ``root`` in messages)."""
    for depth, key in enumerate(field.keys):
        if not isinstance(node, dict):
            where = root if depth == 0 else f"field {'.'.join(field.keys[:depth])!r}"
            raise PayloadError(
                "wrong_type", f"{where} is {_describe(node)}, expected an object with {field.name}"
            )
        try:
            node = node[key]
        except KeyError:
            raise PayloadError("missing_field", f"{field.name} is missing") from None
    return node


_MISSING = object()
_NUMBER_TYPES = frozenset((float, int))  # (not bool: type(True) is bool)
_BIGGEST = 2**53  # integers up to this convert to floats exactly (and never overflow)


def _flat(
    node: dict[str, object],
    keys: tuple[str, str | None, str | None, str | None],
    received_at: float,
    position: int,
) -> Decoded | None:
    """The common reading fast: an object whose fields are plain numbers at one key each.

    Returns None for anything else (a string, a missing field, a value out of range, ...): the
    general path then reads the reading again and says what is wrong, so results and errors
    are those of :func:`_mapped_general`.
    """
    value_key, time_key, sequence_key, exposure_key = keys
    value = node.get(value_key, _MISSING)
    kind = type(value)
    if kind is int and -_BIGGEST <= value <= _BIGGEST:  # type: ignore[operator]
        value = float(value)  # type: ignore[arg-type]
    elif kind is not float or value - value != 0.0:  # type: ignore[operator]  # NaN, infinities
        return None
    moment = received_at
    if time_key is not None:
        raw = node.get(time_key, _MISSING)
        kind = type(raw)
        if kind is int and -_BIGGEST <= raw <= _BIGGEST:  # type: ignore[operator]
            moment = float(raw)  # type: ignore[arg-type]
        elif kind is float and raw - raw == 0.0:  # type: ignore[operator]
            moment = raw  # type: ignore[assignment]
        else:
            return None
        if moment > _MILLISECONDS_ABOVE:
            moment /= 1000.0
        if not _EARLIEST <= moment < _LATEST:
            return None
    sequence = None
    if sequence_key is not None:
        sequence = node.get(sequence_key, _MISSING)
        if type(sequence) is not int:
            return None
    exposure = None
    if exposure_key is not None:
        exposure = node.get(exposure_key, _MISSING)
        kind = type(exposure)
        if kind is int and 0 < exposure <= _BIGGEST:  # type: ignore[operator]
            exposure = float(exposure)  # type: ignore[arg-type]
        elif kind is not float or not 0.0 < exposure < math.inf:  # type: ignore[operator]
            return None
    return Decoded(value, moment, sequence, exposure, position)  # type: ignore[arg-type]


def _mapped(node: object, plan: _Plan, received_at: float, position: int, root: str) -> Decoded:
    """One reading from one JSON value mapped by ``plan``."""
    keys = plan.flat
    if keys is not None and type(node) is dict:
        fast = _flat(node, keys, received_at, position)
        if fast is not None:
            return fast
    return _mapped_general(node, plan, received_at, position, root)


def _mapped_general(node: object, plan: _Plan, received_at: float, position: int, root: str) -> Decoded:
    """One reading from one JSON value mapped by ``plan`` (any paths, any accepted types)."""
    value = _number(_lookup(node, plan.value, root), plan.value.name if plan.value.keys else root)
    time = received_at
    sequence = exposure = None
    if plan.timestamp is not None:
        time = _time(_lookup(node, plan.timestamp, root), plan.timestamp.name)
    if plan.sequence is not None:
        sequence = _sequence(_lookup(node, plan.sequence, root), plan.sequence.name)
    if plan.exposure is not None:
        exposure = _exposure(_lookup(node, plan.exposure, root), plan.exposure.name)
    return Decoded(value, time, sequence, exposure, position)


def _array(document: object, plan: _Plan, mapping: PayloadMapping, received_at: float) -> list[Decoded]:
    items = _lookup(document, plan.items, "the message")
    if not isinstance(items, list):
        where = plan.items.name if plan.items.keys else "the message"
        raise PayloadError("wrong_type", f"{where} is {_describe(items)}, expected an array of readings")
    _check_length(len(items), mapping.max_batch)
    extras = plan.extras()
    keys = plan.flat
    out: list[Decoded] = []
    position = 0
    try:
        for position, item in enumerate(items):
            if type(item) is dict:
                fast = None if keys is None else _flat(item, keys, received_at, position)
                out.append(fast or _mapped_general(item, plan, received_at, position, "the reading"))
            elif isinstance(item, dict):
                out.append(_mapped(item, plan, received_at, position, "the reading"))
            else:
                out.append(_bare(item, extras, received_at, position))
    except PayloadError as error:
        raise PayloadError(error.reason, error.detail, position=position) from None
    return out


def _bare(item: object, extras: list[_Field], received_at: float, position: int) -> Decoded:
    """An array element that is the value itself (a number, or a string holding one)."""
    if extras:
        raise PayloadError(
            "missing_field", f"the reading is {_describe(item)}, not an object with {extras[0].name}"
        )
    return Decoded(_number(item, "the reading"), received_at, None, None, position)


def _columns(document: object, plan: _Plan, mapping: PayloadMapping, received_at: float) -> list[Decoded]:
    if not isinstance(document, dict):
        raise PayloadError(
            "wrong_type", f"the message is {_describe(document)}, expected an object of columns"
        )
    fields = [plan.value, *plan.extras()]
    columns: dict[str, list[object]] = {}
    for field in fields:
        column = _lookup(document, field, "the message")
        if not isinstance(column, list):
            raise PayloadError(
                "wrong_type", f"{field.name} is {_describe(column)}, expected an array (a column)"
            )
        columns[field.path] = column
    lengths = {field.path: len(columns[field.path]) for field in fields}
    if len(set(lengths.values())) > 1:
        sizes = ", ".join(f"{path!r} {n}" for path, n in lengths.items())
        raise PayloadError("mismatched_columns", f"columns have different lengths: {sizes}")
    count = lengths[plan.value.path]
    _check_length(count, mapping.max_batch)
    values = _convert(columns, plan.value, _number)
    times: list[float] = (
        [received_at] * count if plan.timestamp is None else _convert(columns, plan.timestamp, _time)
    )
    sequences: list[int | None] = (
        [None] * count if plan.sequence is None else _convert(columns, plan.sequence, _sequence)
    )
    exposures: list[float | None] = (
        [None] * count if plan.exposure is None else _convert(columns, plan.exposure, _exposure)
    )
    return [
        Decoded(value, time, sequence, exposure, position)
        for position, (value, time, sequence, exposure) in enumerate(
            zip(values, times, sequences, exposures, strict=True)
        )
    ]


def _convert(
    columns: dict[str, list[object]], field: _Field, convert: Callable[[object, str], _T]
) -> list[_T]:
    """One column converted element by element; an error names the element's position."""
    out: list[_T] = []
    try:
        for raw in columns[field.path]:
            out.append(convert(raw, field.name))  # noqa: PERF401 - len(out) is the failing position
    except PayloadError as error:  # the element that failed is the next one
        raise PayloadError(error.reason, error.detail, position=len(out)) from None
    return out


def _check_length(length: int, most: int) -> None:
    if length == 0:
        raise PayloadError("empty_batch", "the batch holds no readings")
    if length > most:
        raise PayloadError(
            "batch_too_long", f"the batch holds {length} readings, more than the {most} allowed"
        )


# ---------------------------------------------------------------- scalars

_WHITESPACE = " \t\r\n\f\v"
_NUMBER_CHARACTERS = "0123456789+-.eE"
_NON_FINITE_WORDS = frozenset(
    sign + word for sign in ("", "+", "-") for word in ("nan", "inf", "infinity", "snan")
)
_EARLIEST = 0.0  # 1970-01-01T00:00:00Z
_LATEST = 7_289_654_400.0  # 2201-01-01T00:00:00Z, the first second after the year 2200
_MILLISECONDS_ABOVE = 1e11


def _number_text(text: str, what: str) -> float:
    """A decimal number in ASCII (sign, digits, point, exponent), whitespace around it allowed."""
    core = text.strip(_WHITESPACE)
    if core and not core.strip(_NUMBER_CHARACTERS):
        try:
            number = float(core)
        except ValueError:
            pass
        else:
            if math.isfinite(number):
                return number
            raise PayloadError("not_finite", f"{what} is too large to be a finite number: {_show(text)}")
    elif core.lower() in _NON_FINITE_WORDS:
        raise PayloadError("not_finite", f"{what} is not finite: {_show(text)}")
    raise PayloadError("not_a_number", f"{what} is not a number: {_show(text)}")


def _number(raw: object, what: str) -> float:
    if isinstance(raw, float):
        if math.isfinite(raw):  # orjson never yields NaN or infinities; stay safe anyway
            return raw
        raise PayloadError("not_finite", f"{what} is not finite: {raw!r}")
    if isinstance(raw, bool):
        raise PayloadError("wrong_type", f"{what} is {_describe(raw)}, expected a number")
    if isinstance(raw, int):
        try:
            return float(raw)
        except OverflowError:
            raise PayloadError("not_finite", f"{what} is too large to be a finite number") from None
    if isinstance(raw, str):
        return _number_text(raw, what)
    raise PayloadError("wrong_type", f"{what} is {_describe(raw)}, expected a number")


def _time(raw: object, what: str) -> float:
    if isinstance(raw, str):
        seconds = _iso_seconds(raw, what)
    elif isinstance(raw, bool) or not isinstance(raw, int | float):
        raise PayloadError(
            "wrong_type", f"{what} is {_describe(raw)}, expected an ISO 8601 time or epoch seconds"
        )
    else:
        seconds = _number(raw, what)
        if seconds > _MILLISECONDS_ABOVE:
            seconds /= 1000.0
    if not _EARLIEST <= seconds < _LATEST:
        raise PayloadError("bad_timestamp", f"{what} is outside the years 1970 to 2200: {_show(raw)}")
    return seconds


def _iso_seconds(text: str, what: str) -> float:
    """Seconds since the epoch of an ISO 8601 / RFC 3339 time; naive times are UTC."""
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        moment = _iso_unusual(text, what)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def _iso_unusual(text: str, what: str) -> datetime:
    """RFC 3339 forms Python's reader refuses: lower-case ``t``/``z`` and leap seconds (``:60``)."""
    fixed = text.upper()
    leap = len(fixed) >= 19 and fixed[13] == ":" and fixed[16] == ":" and fixed[17:19] == "60"
    if leap:
        fixed = f"{fixed[:17]}59{fixed[19:]}"
    try:
        moment = datetime.fromisoformat(fixed)
    except ValueError:
        raise PayloadError(
            "bad_timestamp", f"{what} is not an ISO 8601 / RFC 3339 time: {_show(text)}"
        ) from None
    return moment + timedelta(seconds=1) if leap else moment


def _sequence(raw: object, what: str) -> int:
    if isinstance(raw, int) and not isinstance(raw, bool):
        return raw
    if isinstance(raw, float):
        if raw.is_integer() and abs(raw) <= 2**53:
            return int(raw)
        raise PayloadError("wrong_type", f"{what} is {raw!r}, expected a whole number")
    raise PayloadError("wrong_type", f"{what} is {_describe(raw)}, expected a whole number")


def _exposure(raw: object, what: str) -> float:
    exposure = _number(raw, what)
    if exposure <= 0.0:
        raise PayloadError("not_positive", f"{what} must be positive units inspected, got {exposure!r}")
    return exposure


def _describe(raw: object) -> str:
    """A JSON value's kind (and short text for scalars), for messages."""
    if raw is None:
        return "null"
    if isinstance(raw, bool):
        return "true" if raw else "false"
    if isinstance(raw, dict):
        return "an object"
    if isinstance(raw, list):
        return "an array"
    if isinstance(raw, str):
        return f"the string {_show(raw)}"
    return f"the number {_show(raw)}"


def _show(raw: object) -> str:
    """A short, escaped rendering of a scalar (safe to log)."""
    if isinstance(raw, str) and len(raw) > 40:
        return repr(raw[:40]) + "..."
    return repr(raw)


# ================================================================ routing

RejectionReason: TypeAlias = Literal["unsafe_value", "invalid_chart_id", "shared_chart_id"]
REJECTION_REASONS: tuple[RejectionReason, ...] = get_args(RejectionReason)
"""Every ``Rejection.reason``."""

_PLACEHOLDER_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_VALUE_CHARACTERS = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._-"
_VALUE_PATTERN = "[A-Za-z0-9._-]+"
# the chart id rule of the configuration: levels of letters, digits, '.', '_', '-', each
# starting with a letter or digit, separated by single '/'
_TOPIC_MAX_BYTES = 65535  # MQTT 3.1.1 section 1.5.3: UTF-8 strings are at most 65535 bytes
_CACHED_TOPIC_MAX = 1024  # longer topics are routed but not cached, to bound the cache's memory


@dataclass(frozen=True, slots=True)
class Route:
    """One chart a topic feeds.

    Args:
        template_id: the configured chart id template, e.g. ``"press/{machine}/thickness"``.
        chart_id: the expanded chart id, e.g. ``"press/press-2/thickness"``.
        topic_filter: the subscription filter that matched, e.g. ``"plant/+/thickness"``.
    """

    template_id: str
    chart_id: str
    topic_filter: str


@dataclass(frozen=True, slots=True)
class Rejection:
    """A chart a topic matched but may not feed, and why.

    Args:
        template_id: the configured chart id template.
        topic_filter: the subscription filter that matched.
        reason: ``"unsafe_value"`` (a placeholder value is empty or has characters other than
            letters, digits, ``.``, ``_``, ``-``), ``"invalid_chart_id"`` (the expanded id
            breaks the chart id rule: a level starting with ``.``/``_``/``-``, or more than 200
            characters) or ``"shared_chart_id"`` (another configured chart could have the
            same id, so neither may take it from a placeholder).
        detail: what is wrong, as a sentence.
    """

    template_id: str
    topic_filter: str
    reason: RejectionReason
    detail: str


@dataclass(frozen=True, slots=True)
class Routing:
    """Everything a topic does: the charts it feeds and the matches refused, in configuration order."""

    routes: tuple[Route, ...]
    rejected: tuple[Rejection, ...]


@dataclass(frozen=True, slots=True)
class CacheInfo:
    """How the per-topic routing cache is doing."""

    hits: int
    misses: int
    size: int
    capacity: int


@dataclass(frozen=True, slots=True)
class _Chart:
    template_id: str
    topic_filter: str
    literals: tuple[str, ...]  # id = literals[0] + value(names[0]) + literals[1] + ...
    names: tuple[str, ...]
    levels: dict[str, int]  # placeholder name -> topic level it fills
    pattern: re.Pattern[str]  # every id this chart could have
    shape: str  # the id template with placeholders numbered by first use
    depth: int  # levels of the chart id


class Router:
    """Which charts each topic feeds, with ``{name}`` placeholders expanded.

    Each chart is a pair (chart id template, topic template). A topic template is an MQTT
    topic filter whose levels may also be ``{name}``: a placeholder filling one whole level,
    subscribed as ``+``. ``+`` and ``#`` keep their MQTT 3.1.1 (section 4.7) meaning and are
    matched by :func:`monitor.topics.matches`. A chart id template may use the placeholders of
    its topic template anywhere (``press/{machine}``, ``line-{line}/bore``); braces are
    reserved for placeholders in both.

    A placeholder value is refused (a :class:`Rejection`, not an error) unless it is one or
    more letters, digits, ``.``, ``_``, ``-`` and the expanded id keeps the chart id rule, so
    no topic can add a level, leave its template's prefix or use wildcard characters. An
    expanded id that another configured chart could also have is refused as well: a static
    chart keeps its id, and two templates never mix their readings in one chart.

    :meth:`resolve` answers both questions of a topic in one look-up (the routes, and the
    matches refused with their reasons, for the caller to count and log); :meth:`route` and
    :meth:`rejected` are its two halves. Answers are cached per topic, least recently used out
    first (topics longer than 1024 characters are not cached). Not thread-safe: use one router
    per thread or event loop.

    Args:
        charts: (chart id template, topic template) pairs, in configuration order.
        cache_size: most topics whose routing is remembered (0 remembers none).

    Raises:
        ConfigError: a template is malformed, a chart id template uses a placeholder its topic
            template does not name, or two chart id templates repeat or produce the same ids.

    Examples:
        >>> router = Router([
        ...     ("press/{machine}/thickness", "plant/{machine}/thickness"),
        ...     ("press/{machine}/thickness-ewma", "plant/{machine}/thickness"),
        ...     ("plant/all", "plant/#"),
        ... ])
        >>> router.filters()
        ['plant/+/thickness', 'plant/#']
        >>> [r.chart_id for r in router.route("plant/press-2/thickness")]
        ['press/press-2/thickness', 'press/press-2/thickness-ewma', 'plant/all']
        >>> [r.reason for r in router.rejected("plant/..evil/thickness")]
        ['invalid_chart_id', 'invalid_chart_id']
        >>> [r.reason for r in router.rejected("plant/press#2/thickness")]
        ['unsafe_value', 'unsafe_value']
    """

    def __init__(self, charts: Sequence[tuple[str, str]], *, cache_size: int = 100_000) -> None:
        if isinstance(cache_size, bool) or not isinstance(cache_size, int) or cache_size < 0:
            raise ConfigError(f"cache_size must be a non-negative integer, got {cache_size!r}")
        self._charts = tuple(_compile_chart(template_id, topic) for template_id, topic in charts)
        _check_distinct(self._charts)
        self._rivals = {
            chart.template_id: tuple(
                other for other in self._charts if other is not chart and other.depth == chart.depth
            )
            for chart in self._charts
        }
        self._capacity = cache_size
        self._cache: dict[str, Routing] = {}
        self._hits = 0
        self._misses = 0

    def __repr__(self) -> str:
        """Class and number of charts."""
        return f"Router(charts={len(self._charts)})"

    def filters(self) -> list[str]:
        """The distinct subscription filters, in configuration order."""
        return list(dict.fromkeys(chart.topic_filter for chart in self._charts))

    def route(self, topic: str) -> list[Route]:
        """Every chart this topic feeds, in configuration order (empty if none)."""
        return list(self.resolve(topic).routes)

    def rejected(self, topic: str) -> list[Rejection]:
        """The charts this topic matched but may not feed, and why (empty if none)."""
        return list(self.resolve(topic).rejected)

    def resolve(self, topic: str) -> Routing:
        """Routes and rejections of a topic at once, from the cache when possible."""
        cached = self._cache.pop(topic, None)
        if cached is not None:
            self._cache[topic] = cached  # now the most recently used
            self._hits += 1
            return cached
        self._misses += 1
        routing = self._routing(topic)
        if self._capacity and len(topic) <= _CACHED_TOPIC_MAX:
            self._cache[topic] = routing
            if len(self._cache) > self._capacity:
                del self._cache[next(iter(self._cache))]
        return routing

    def cache_info(self) -> CacheInfo:
        """Hits, misses, size and capacity of the per-topic cache."""
        return CacheInfo(self._hits, self._misses, len(self._cache), self._capacity)

    def _routing(self, topic: str) -> Routing:
        levels = topic.split("/")
        matched: dict[str, bool] = {}
        routes: list[Route] = []
        rejected: list[Rejection] = []
        for chart in self._charts:
            hit = matched.get(chart.topic_filter)
            if hit is None:
                hit = matched[chart.topic_filter] = matches(chart.topic_filter, topic)
            if not hit:
                continue
            outcome = self._expand(chart, levels)
            if isinstance(outcome, Rejection):
                rejected.append(outcome)
            else:
                routes.append(Route(chart.template_id, outcome, chart.topic_filter))
        return Routing(tuple(routes), tuple(rejected))

    def _expand(self, chart: _Chart, levels: list[str]) -> str | Rejection:
        if not chart.names:
            return chart.template_id
        parts = [chart.literals[0]]
        for name, literal in zip(chart.names, chart.literals[1:], strict=True):
            value = levels[chart.levels[name]]
            if not value or value.strip(_VALUE_CHARACTERS):
                return Rejection(
                    chart.template_id,
                    chart.topic_filter,
                    "unsafe_value",
                    f"placeholder {name!r} would be {_show(value)}; a value is one or more "
                    "letters, digits, '.', '_', '-'",
                )
            parts += (value, literal)
        chart_id = "".join(parts)
        if not is_chart_id(chart_id):
            return Rejection(
                chart.template_id,
                chart.topic_filter,
                "invalid_chart_id",
                f"chart id {_show(chart_id)} is not a valid chart id (levels start with a letter "
                f"or digit, at most {CHART_ID_MAX} characters)",
            )
        for other in self._rivals[chart.template_id]:
            if other.pattern.fullmatch(chart_id):
                return Rejection(
                    chart.template_id,
                    chart.topic_filter,
                    "shared_chart_id",
                    f"chart id {chart_id!r} could also belong to chart {other.template_id!r}",
                )
        return chart_id


def _compile_chart(template_id: str, topic: str) -> _Chart:
    """Check one (chart id template, topic template) pair and prepare it for routing."""
    if not isinstance(template_id, str) or not isinstance(topic, str):
        raise ConfigError(f"a chart is a pair of strings, got {(template_id, topic)!r}")
    topic_filter, levels = _compile_topic(topic)
    literals, names = _split_id_template(template_id)
    sample = "a".join(literals)
    if not is_chart_id(sample):
        raise ConfigError(
            f"chart id template {template_id!r} does not make chart ids: a chart id is 1-200 "
            "characters of letters, digits, '.', '_', '-', in levels separated by single '/'"
        )
    for name in names:
        if name not in levels:
            named = ", ".join(repr(n) for n in levels) or "none"
            raise ConfigError(
                f"chart id template {template_id!r} uses placeholder {{{name}}}, which topic "
                f"template {topic!r} does not name (it names: {named})"
            )
    pattern = re.escape(literals[0])
    seen: set[str] = set()
    for name, literal in zip(names, literals[1:], strict=True):
        pattern += f"(?P={name})" if name in seen else f"(?P<{name}>{_VALUE_PATTERN})"
        pattern += re.escape(literal)
        seen.add(name)
    return _Chart(
        template_id=template_id,
        topic_filter=topic_filter,
        literals=literals,
        names=names,
        levels=levels,
        pattern=re.compile(pattern),
        shape=_shape(literals, names),
        depth=sample.count("/") + 1,
    )


def _compile_topic(topic: str) -> tuple[str, dict[str, int]]:
    """The subscription filter of a topic template and the level of each placeholder."""
    if not topic or "\x00" in topic or len(topic.encode("utf-8", "surrogatepass")) > _TOPIC_MAX_BYTES:
        raise ConfigError(
            f"topic template {_show(topic)} must be a non-empty string without NUL characters, "
            f"at most {_TOPIC_MAX_BYTES} bytes"
        )
    parts = topic.split("/")
    levels: dict[str, int] = {}
    for index, level in enumerate(parts):
        if level.startswith("{") and level.endswith("}") and _PLACEHOLDER_NAME.fullmatch(level[1:-1]):
            name = level[1:-1]
            if name in levels:
                raise ConfigError(f"topic template {topic!r} names placeholder {level} twice")
            levels[name] = index
            parts[index] = "+"
        elif "{" in level or "}" in level:
            raise ConfigError(
                f"topic template {topic!r}: a placeholder is a whole level like '{{machine}}' "
                f"(a name of letters, digits and '_'), got {level!r}"
            )
        elif "#" in level and (level != "#" or index != len(parts) - 1):
            raise ConfigError(f"topic template {topic!r}: '#' may only be the whole last level")
        elif "+" in level and level != "+":
            raise ConfigError(f"topic template {topic!r}: '+' must fill a whole level")
    return "/".join(parts), levels


def _shape(literals: tuple[str, ...], names: tuple[str, ...]) -> str:
    """The id template with names replaced by order of first use: equal shapes, equal ids."""
    order = {name: str(i) for i, name in enumerate(dict.fromkeys(names))}
    return literals[0] + "".join(f"{{{order[n]}}}{lit}" for n, lit in zip(names, literals[1:], strict=True))


def _split_id_template(template_id: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Literal text and placeholder names of a chart id template, alternating."""
    literals: list[str] = []
    names: list[str] = []
    rest = template_id
    while True:
        start = rest.find("{")
        if "}" in (rest if start < 0 else rest[:start]):
            raise ConfigError(f"chart id template {template_id!r} has a '}}' without its '{{'")
        if start < 0:
            literals.append(rest)
            return tuple(literals), tuple(names)
        end = rest.find("}", start)
        name = rest[start + 1 : end]
        if end < 0 or not _PLACEHOLDER_NAME.fullmatch(name):
            raise ConfigError(
                f"chart id template {template_id!r}: a placeholder is '{{name}}' with a name of "
                "letters, digits and '_'"
            )
        literals.append(rest[:start])
        names.append(name)
        rest = rest[end + 1 :]


def _check_distinct(charts: tuple[_Chart, ...]) -> None:
    """No chart id template twice, and no two templates with the very same ids."""
    seen: set[str] = set()
    shapes: dict[str, str] = {}
    for chart in charts:
        if chart.template_id in seen:
            raise ConfigError(f"chart id template {chart.template_id!r} is configured more than once")
        seen.add(chart.template_id)
        earlier = shapes.setdefault(chart.shape, chart.template_id)
        if earlier != chart.template_id:
            raise ConfigError(
                f"chart id templates {earlier!r} and {chart.template_id!r} produce the same chart ids"
            )
