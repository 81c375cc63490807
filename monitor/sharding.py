"""Which daemon instance keeps which chart, when several share the work.

Charts are spread over ``count`` instances (shards) by rendezvous hashing, also called highest
random weight: every shard gets a weight for the chart from a stable hash of (shard, chart id),
and the shard with the highest weight owns the chart. Every instance computes the same owner
without talking to the others, the charts spread evenly, and when a shard is added only the
charts that the new shard wins move (about 1/(n+1) of them); none moves between old shards.

The hash is BLAKE2b from :mod:`hashlib`, never Python's :func:`hash`, which is salted per
process and would give every instance a different answer.

An instance learns its shard from the environment (:func:`shard_from_environment`):

``MONITOR_SHARD_COUNT``
    How many shards there are (1 to 1024). Keep it equal to the StatefulSet's ``replicas``.
``MONITOR_SHARD_INDEX``
    This instance's shard, 0 to count - 1. In Kubernetes, fill it from the pod label
    ``apps.kubernetes.io/pod-index`` through the downward API. An empty value counts as unset.
``MONITOR_POD_NAME``
    Used when ``MONITOR_SHARD_INDEX`` is unset or empty: a StatefulSet pod name
    ``<name>-<ordinal>`` (fill it from ``metadata.name``); the ordinal is the shard.
``MONITOR_SHARD_ORDINAL_START``
    Optional, default 0: the StatefulSet's ``spec.ordinals.start``, subtracted from the index
    or ordinal above.

None of them set means no sharding: the instance keeps every chart. Each shard needs its own
MQTT session, so the client id gets the shard as a suffix (:func:`shard_client_id`).

Examples:
    >>> owner("press-1/thickness", 1)
    0
    >>> owner("press-1/thickness", 3) == owner("press-1/thickness", 3)
    True
    >>> shard_from_environment({"MONITOR_SHARD_COUNT": "3", "MONITOR_POD_NAME": "line-monitor-2"})
    (2, 3)
    >>> shard_from_environment({}) is None
    True
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Mapping

from monitor.spc import ConfigError

__all__ = [
    "COUNT_VARIABLE",
    "INDEX_VARIABLE",
    "MAX_SHARDS",
    "ORDINAL_START_VARIABLE",
    "POD_NAME_VARIABLE",
    "owner",
    "owns",
    "shard_client_id",
    "shard_from_environment",
    "weight",
]

COUNT_VARIABLE = "MONITOR_SHARD_COUNT"
INDEX_VARIABLE = "MONITOR_SHARD_INDEX"
POD_NAME_VARIABLE = "MONITOR_POD_NAME"
ORDINAL_START_VARIABLE = "MONITOR_SHARD_ORDINAL_START"
MAX_SHARDS = 1024
"""Most shards allowed; a chart's owner costs one hash per shard."""

_POD_NAME = re.compile(r"^(?P<name>.+)-(?P<ordinal>[0-9]+)$")
_CLIENT_ID_LIMIT = 64


def weight(chart_id: str, shard: int) -> int:
    """The rendezvous weight of ``shard`` for ``chart_id``: 64 bits of BLAKE2b over ``"<shard>:<chart id>"``.

    Examples:
        >>> weight("press-1/thickness", 0) == weight("press-1/thickness", 0)
        True
    """
    digest = hashlib.blake2b(f"{shard}:{chart_id}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "big")


def owner(chart_id: str, shards: int) -> int:
    """The shard (0 to ``shards`` - 1) that keeps ``chart_id``: the one of highest weight.

    Ties (equal 64-bit weights) go to the lowest shard.

    Raises:
        ConfigError: ``shards`` is not between 1 and :data:`MAX_SHARDS`.
    """
    _check_count(shards, "the number of shards")
    best, best_weight = 0, -1
    for shard in range(shards):
        w = weight(chart_id, shard)
        if w > best_weight:
            best, best_weight = shard, w
    return best


def owns(chart_id: str, index: int, count: int) -> bool:
    """Whether shard ``index`` of ``count`` keeps ``chart_id``."""
    return owner(chart_id, count) == index


def shard_client_id(client_id: str, index: int) -> str:
    """The MQTT client id of one shard: ``<client_id>-<index>``, so each shard has its own session.

    Raises:
        ConfigError: the result is longer than the 64 characters a client id may have here.

    Examples:
        >>> shard_client_id("line-monitor", 2)
        'line-monitor-2'
    """
    result = f"{client_id}-{index}"
    if len(result) > _CLIENT_ID_LIMIT:
        raise ConfigError(
            f"broker.client_id {client_id!r} with the shard suffix -{index} is longer than "
            f"{_CLIENT_ID_LIMIT} characters; shorten it"
        )
    return result


def _check_count(count: int, what: str) -> None:
    if isinstance(count, bool) or not isinstance(count, int) or not 1 <= count <= MAX_SHARDS:
        raise ConfigError(f"{what} must be a whole number from 1 to {MAX_SHARDS}, got {count!r}")


def _whole(environ: Mapping[str, str], name: str) -> int | None:
    """A non-negative whole number from the environment; None when unset or empty."""
    raw = environ.get(name)
    if raw is None or not raw.strip():
        return None
    text = raw.strip()
    if not text.isdigit() or not text.isascii():
        raise ConfigError(f"{name} must be a whole number of 0 or more, got {raw!r}")
    return int(text)


def shard_from_environment(environ: Mapping[str, str]) -> tuple[int, int] | None:
    """This instance's ``(index, count)`` from the environment, or None when it is not sharded.

    See the module documentation for the variables.

    Raises:
        ConfigError: a value is not a whole number, the index is not below the count, or the
            variables are only partly set (a count without an index, or the reverse).
    """
    count = _whole(environ, COUNT_VARIABLE)
    index = _whole(environ, INDEX_VARIABLE)
    index_source = INDEX_VARIABLE
    pod_name = (environ.get(POD_NAME_VARIABLE) or "").strip()
    if index is None and pod_name:
        match = _POD_NAME.match(pod_name)
        if match is None:
            raise ConfigError(
                f"{POD_NAME_VARIABLE} must be a StatefulSet pod name '<name>-<ordinal>', got {pod_name!r}"
            )
        index = int(match.group("ordinal"))
        index_source = POD_NAME_VARIABLE
    if count is None and index is None:
        return None
    if count is None:
        raise ConfigError(
            f"{index_source} is set but {COUNT_VARIABLE} is not; set it to the number of shards "
            "(the StatefulSet's replicas)"
        )
    if index is None:
        raise ConfigError(
            f"{COUNT_VARIABLE} is set but this instance's shard is not; set {INDEX_VARIABLE} "
            f"(from the pod label apps.kubernetes.io/pod-index) or {POD_NAME_VARIABLE}"
        )
    _check_count(count, COUNT_VARIABLE)
    start = _whole(environ, ORDINAL_START_VARIABLE) or 0
    if index < start:
        raise ConfigError(f"{index_source} gives shard {index}, below {ORDINAL_START_VARIABLE} ({start})")
    index -= start
    if index >= count:
        raise ConfigError(
            f"{index_source} gives shard {index + start}, but {COUNT_VARIABLE} is {count} "
            f"(shards {start} to {start + count - 1}); keep {COUNT_VARIABLE} equal to the replicas"
        )
    return index, count
