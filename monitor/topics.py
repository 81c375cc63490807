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

__all__ = ["matches"]


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
