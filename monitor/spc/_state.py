"""Reading values back out of JSON state dicts with clear errors (no Any, no casts)."""

from __future__ import annotations

import math

from monitor.spc.errors import StateError
from monitor.spc.types import JSONValue, State

__all__ = [
    "check_header",
    "get_bool",
    "get_float",
    "get_float_list",
    "get_int",
    "get_int_list",
    "get_optional_float",
    "get_optional_int",
    "get_state",
    "get_state_list",
    "get_str",
    "header",
]


def _missing(state: State, key: str, what: str) -> StateError:
    return StateError(f"snapshot field {key!r} must be {what}, got {state.get(key)!r}")


def get_float(state: State, key: str) -> float:
    """A finite or infinite float (ints accepted)."""
    value = state.get(key)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise _missing(state, key, "a number")
    return float(value)


def get_optional_float(state: State, key: str) -> float | None:
    """A float or None."""
    if state.get(key) is None:
        return None
    return get_float(state, key)


def get_int(state: State, key: str) -> int:
    """An integer."""
    value = state.get(key)
    if isinstance(value, bool) or not isinstance(value, int):
        raise _missing(state, key, "an integer")
    return value


def get_optional_int(state: State, key: str) -> int | None:
    """An integer or None."""
    if state.get(key) is None:
        return None
    return get_int(state, key)


def get_bool(state: State, key: str) -> bool:
    """A boolean."""
    value = state.get(key)
    if not isinstance(value, bool):
        raise _missing(state, key, "true or false")
    return value


def get_str(state: State, key: str) -> str:
    """A string."""
    value = state.get(key)
    if not isinstance(value, str):
        raise _missing(state, key, "a string")
    return value


def _as_float(item: JSONValue, key: str) -> float:
    if isinstance(item, bool) or not isinstance(item, int | float):
        raise StateError(f"snapshot list {key!r} must hold numbers, found {item!r}")
    return float(item)


def get_float_list(state: State, key: str) -> list[float]:
    """A list of numbers."""
    value = state.get(key)
    if not isinstance(value, list):
        raise _missing(state, key, "a list of numbers")
    return [_as_float(item, key) for item in value]


def get_int_list(state: State, key: str) -> list[int]:
    """A list of integers."""
    value = state.get(key)
    if not isinstance(value, list):
        raise _missing(state, key, "a list of integers")
    out: list[int] = []
    for item in value:
        if isinstance(item, bool) or not isinstance(item, int):
            raise StateError(f"snapshot list {key!r} must hold integers, found {item!r}")
        out.append(item)
    return out


def get_state(state: State, key: str) -> State:
    """A nested object."""
    value = state.get(key)
    if not isinstance(value, dict):
        raise _missing(state, key, "an object")
    return value


def get_optional_state(state: State, key: str) -> State | None:
    """A nested object or None."""
    if state.get(key) is None:
        return None
    return get_state(state, key)


def get_state_list(state: State, key: str) -> list[State]:
    """A list of nested objects."""
    value = state.get(key)
    if not isinstance(value, list):
        raise _missing(state, key, "a list of objects")
    out: list[State] = []
    for item in value:
        if not isinstance(item, dict):
            raise StateError(f"snapshot list {key!r} must hold objects, found {item!r}")
        out.append(item)
    return out


def header(kind: str, schema: int) -> State:
    """The two fields every snapshot starts with."""
    return {"kind": kind, "schema": schema}


def check_header(state: State, kind: str, schema: int) -> None:
    """Refuse a snapshot of another kind or of a newer schema than this code reads."""
    found_kind = state.get("kind")
    if found_kind != kind:
        raise StateError(f"snapshot is of kind {found_kind!r}, expected {kind!r}")
    found_schema = state.get("schema")
    if isinstance(found_schema, bool) or not isinstance(found_schema, int):
        raise StateError(f"snapshot of kind {kind!r} has no integer 'schema' field")
    if found_schema > schema:
        raise StateError(
            f"snapshot of kind {kind!r} has schema {found_schema}; this version reads up to "
            f"{schema}; upgrade the monitor or discard the snapshot"
        )


def finite_or_none(value: float | None) -> float | None:
    """Map infinities and NaN to None for JSON; keep finite values exactly."""
    if value is None or not math.isfinite(value):
        return None
    return value
