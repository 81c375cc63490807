"""MQTT topic filters: matching topics against the filters charts subscribe to.

Examples:
    >>> matches("brightwater/+/thickness", "brightwater/press-1/thickness")
    True
    >>> matches("brightwater/#", "brightwater")
    True
    >>> matches("brightwater/+/thickness", "brightwater/press-1/width")
    False
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import Final

__all__ = ["CHART_ID", "CHART_ID_MAX", "covers", "is_chart_id", "matches", "minimal_filters", "overlaps"]

CHART_ID: Final = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*(?:/[A-Za-z0-9][A-Za-z0-9._-]*)*")
"""A chart id: levels of letters, digits, '.', '_', '-' (not starting with a punctuation mark),
separated by single '/'. Safe as MQTT topic levels (no wildcards, no '$', no empty level)."""

CHART_ID_MAX: Final = 200
"""Most characters in a chart id."""


def is_chart_id(text: str) -> bool:
    """Whether ``text`` is a valid chart id.

    Examples:
        >>> is_chart_id("press-1/thickness"), is_chart_id("press+1"), is_chart_id("a//b")
        (True, False, False)
    """
    return len(text) <= CHART_ID_MAX and CHART_ID.fullmatch(text) is not None


def matches(topic_filter: str, topic: str) -> bool:
    """Whether ``topic`` matches ``topic_filter`` (MQTT 3.1.1 section 4.7 wildcards).

    ``+`` matches exactly one level, ``#`` (last level only) matches the parent level and
    any number of levels below it. Topics starting with ``$`` match no leading wildcard.
    """
    if topic.startswith("$") and topic_filter[:1] in ("+", "#"):
        return False
    wanted = topic_filter.split("/")
    given = topic.split("/")
    for i, level in enumerate(wanted):
        if level == "#":
            return True
        if i >= len(given):
            return False
        if level not in ("+", given[i]):
            return False
    return len(wanted) == len(given)


def covers(wide: str, narrow: str) -> bool:
    """Whether every topic matching filter ``narrow`` also matches filter ``wide``.

    Examples:
        >>> covers("plant/#", "plant/+/thickness"), covers("plant/+/thickness", "plant/#")
        (True, False)
        >>> covers("#", "$SYS/uptime"), covers("plant/#", "plant")
        (False, True)
    """
    wide_levels, narrow_levels = wide.split("/"), narrow.split("/")
    dollar = narrow_levels[0].startswith("$")  # wildcards never match a leading '$' level
    for i, level in enumerate(wide_levels):
        if level == "#":
            # '#' matches the parent level and everything below it
            return i <= len(narrow_levels) and not (i == 0 and dollar)
        if i >= len(narrow_levels):
            return False
        if narrow_levels[i] == "#":
            # only '+/#' covers a leading '#': both match every topic of one level or more
            return i == 0 and level == "+" and wide_levels[1:] == ["#"]
        if level == "+":
            if i == 0 and dollar:
                return False
        elif level != narrow_levels[i]:
            return False
    return len(wide_levels) == len(narrow_levels)


def minimal_filters(filters: Sequence[str]) -> list[str]:
    """The filters to subscribe to so each topic is delivered once: drop those another covers.

    A broker may deliver a message once per matching subscription of a client (MQTT 3.1.1,
    section 3.3.5), so overlapping subscriptions could count a reading twice.

    Examples:
        >>> minimal_filters(["plant/+/thickness", "plant/#", "other/x", "plant/#"])
        ['plant/#', 'other/x']
    """
    distinct = list(dict.fromkeys(filters))
    kept: list[str] = []
    for i, candidate in enumerate(distinct):
        covered = any(
            covers(other, candidate) and (not covers(candidate, other) or j < i)
            for j, other in enumerate(distinct)
            if j != i
        )
        if not covered:
            kept.append(candidate)
    return kept


def overlaps(first: str, second: str) -> bool:
    """Whether some topic matches both filters.

    Examples:
        >>> overlaps("plant/#", "plant/monitor/alerts/x"), overlaps("plant/+/a", "plant/b/c")
        (True, False)
    """
    a, b = first.split("/"), second.split("/")
    for i in range(max(len(a), len(b))):
        if i >= len(a) or i >= len(b):
            longer = b if i >= len(a) else a
            return longer[i] == "#"  # '#' also matches the parent level
        x, y = a[i], b[i]
        if "#" in (x, y) or "+" in (x, y):
            literal = y if x in ("#", "+") else x
            if i == 0 and literal.startswith("$"):
                return False
            if "#" in (x, y):
                return True
            continue
        if x != y:
            return False
    return True
