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


# ---------------------------------------------------------------- covering and overlapping filters

import itertools  # noqa: E402

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from monitor.topics import covers, minimal_filters, overlaps  # noqa: E402


@st.composite
def _filters(draw):
    levels = draw(st.lists(st.sampled_from(["a", "b", "$s", "", "+"]), min_size=1, max_size=4))
    if draw(st.booleans()):
        levels = [*levels[:-1], "#"] if draw(st.booleans()) else [*levels, "#"]
    return "/".join(levels)


# every topic of up to 4 levels over the small alphabet: a brute-force witness
_ALL_TOPICS = ["/".join(p) for n in range(1, 5) for p in itertools.product(["a", "b", "$s", ""], repeat=n)]


@settings(max_examples=400, deadline=None)
@given(wide=_filters(), narrow=_filters())
def test_covering_agrees_with_matching_every_topic(wide, narrow):
    """covers(A, B) holds exactly when every topic matching B (brute force, up to 6 levels) matches A."""
    topics = _ALL_TOPICS + [t + "/a/b" for t in _ALL_TOPICS] + [t + "/b" for t in _ALL_TOPICS]
    assert covers(wide, narrow) == all(matches(wide, t) for t in topics if matches(narrow, t))


@settings(max_examples=300, deadline=None)
@given(first=_filters(), second=_filters())
def test_overlap_agrees_with_matching_some_topic(first, second):
    """overlaps(A, B) holds exactly when some topic (brute force, up to 6 levels) matches both."""
    topics = _ALL_TOPICS + [t + "/a/b" for t in _ALL_TOPICS]
    assert overlaps(first, second) == any(matches(first, t) and matches(second, t) for t in topics)


@settings(max_examples=200, deadline=None)
@given(filters=st.lists(_filters(), min_size=1, max_size=6))
def test_minimal_filters_keep_every_topic_and_deliver_it_once(filters):
    """The kept filters match the same topics, and no kept filter is covered by another."""
    kept = minimal_filters(filters)
    for t in _ALL_TOPICS:
        assert any(matches(f, t) for f in filters) == any(matches(f, t) for f in kept)
    for i, a in enumerate(kept):
        for j, b in enumerate(kept):
            if i != j:
                assert not covers(a, b)
