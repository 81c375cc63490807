"""Topic filter matching, checked against the examples of the MQTT 3.1.1 standard."""

from __future__ import annotations

import pytest

from monitor.topics import matches

# OASIS MQTT Version 3.1.1 (2014), section 4.7 "Topic Names and Topic Filters", the
# non-normative examples of 4.7.1.2 (multi-level wildcard), 4.7.1.3 (single-level wildcard)
# and 4.7.2 (topics beginning with $).
SPEC_EXAMPLES = [
    ("sport/tennis/player1/#", "sport/tennis/player1", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/ranking", True),
    ("sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", True),
    ("sport/#", "sport", True),
    ("sport/tennis/+", "sport/tennis/player1", True),
    ("sport/tennis/+", "sport/tennis/player2", True),
    ("sport/tennis/+", "sport/tennis/player1/ranking", False),
    ("sport/+", "sport", False),
    ("sport/+", "sport/", True),
    ("+/+", "/finance", True),
    ("/+", "/finance", True),
    ("+", "/finance", False),
    ("#", "$SYS/broker/uptime", False),
    ("+/monitor/Clients", "$SYS/monitor/Clients", False),
    ("$SYS/#", "$SYS/broker/uptime", True),
    ("$SYS/monitor/+", "$SYS/monitor/Clients", True),
]


@pytest.mark.parametrize(("topic_filter", "topic", "expected"), SPEC_EXAMPLES)
def test_filters_match_as_in_the_mqtt_standard(topic_filter, topic, expected):
    """Each example of the MQTT 3.1.1 standard matches (or not) as the standard says."""
    assert matches(topic_filter, topic) is expected


def test_levels_are_compared_exactly():
    """Topic levels are case-sensitive and compared whole (MQTT 3.1.1, 4.7.3)."""
    assert not matches("plant/Press-1/thickness", "plant/press-1/thickness")
    assert not matches("plant/press", "plant/press-1")
    assert matches("plant/press-1/thickness", "plant/press-1/thickness")
