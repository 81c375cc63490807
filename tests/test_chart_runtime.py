"""A chart's runtime in the daemon: which settings changes keep the limits and which make new ones."""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.alerts import AlertSettings
from monitor.config import load_config_text
from monitor.daemon import ChartOutput, ChartRuntime, SequenceTracker
from monitor.spc import Reading
from monitor.store import LimitsRow

TEMPLATE = """\
charts:
  - id: press/thickness
    topic: plant/press/thickness
    subgroup: {{size: 5}}
    kinds: [xbar_r]
    limits: {limits}
    rules: {rules}
"""


def runtime(limits: str = "{mean: 8.0, sigma: 0.04}", rules: str = "western-electric") -> ChartRuntime:
    chart = load_config_text(TEMPLATE.format(limits=limits, rules=rules), "plant.yaml").charts[0]
    return ChartRuntime(chart.id, chart, AlertSettings())


def feed(rt: ChartRuntime, values: list[float], start: float = 1_767_600_000.0) -> ChartOutput:
    out = ChartOutput()
    rt.feed([Reading(v, start + i) for i, v in enumerate(values)], 0, out)
    return out


def test_changing_rules_keeps_the_limits_and_their_version():
    old = runtime()
    feed(old, [8.0, 8.01, 7.99, 8.02, 7.98])
    new = runtime(rules="nelson")
    notes = new.restore(old.to_state())
    assert any("limits kept" in note for note in notes)
    assert not new.new_settings
    assert new.limits_version == old.limits_version == 1
    assert new.chart_set.parameters == old.chart_set.parameters
    assert new.chart_set.next_index == 1


def test_changing_the_standard_values_makes_a_new_version():
    old = runtime()
    feed(old, [8.0, 8.01, 7.99, 8.02, 7.98])
    new = runtime(limits="{mean: 8.1, sigma: 0.04}")
    notes = new.restore(old.to_state())
    assert any("new limits" in note for note in notes)
    out = feed(new, [8.1, 8.11, 8.09, 8.12, 8.08])
    assert [(row.version, row.mean) for row in out.limits] == [(2, 8.1)]


def test_a_baseline_plan_kept_over_a_rules_change_is_not_collected_again():
    plan = "{baseline: {subgroups: 3}}"
    old = runtime(limits=plan, rules="none")
    feed(old, [8.0, 8.01, 7.99, 8.02, 7.98] * 3)
    assert old.chart_set.monitoring
    new = runtime(limits=plan, rules="western-electric")
    new.restore(old.to_state())
    assert new.chart_set.monitoring
    assert new.chart_set.estimate == old.chart_set.estimate
    out = feed(new, [8.0, 8.01, 7.99, 8.02, 7.98])
    assert [row.index for row in out.subgroups] == [3]
    assert out.limits == []


def test_adopting_a_stored_version_charts_the_next_subgroup_against_it():
    rt = runtime()
    feed(rt, [8.0, 8.01, 7.99, 8.02, 7.98])
    rt.adopt_limits(LimitsRow("press/thickness", 2, 8.5, 0.05, "baseline", {}, 0))
    out = feed(rt, [8.5, 8.51, 8.49, 8.52, 8.48])
    (row,) = out.subgroups
    mean_point = row.points["xbar_r"]["mean"]  # type: ignore[index]
    assert mean_point["center"] == 8.5
    assert mean_point["upper"] == pytest.approx(8.5 + 3 * 0.05 / 5**0.5)
    assert out.signals == []
    assert rt.limits_version == 2
    assert rt.to_state()["limits_version"] == 2


@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.integers(min_value=0, max_value=400), min_size=1, max_size=300),
    st.randoms(use_true_random=False),
)
def test_sequence_numbers_count_once_in_any_order_and_across_a_checkpoint(numbers, rng):
    """Every distinct sequence number is accepted exactly once, however late it comes.

    The reference is a plain set of the numbers seen (common practice, no source); the stream
    is cut at a random point and continued from the tracker's checkpoint.
    """
    cut = rng.randint(0, len(numbers))
    tracker = SequenceTracker()
    accepted = [tracker.accept(n) for n in numbers[:cut]]
    tracker = SequenceTracker.from_state(json.loads(json.dumps(tracker.to_state())))
    accepted += [tracker.accept(n) for n in numbers[cut:]]
    seen: set[int] = set()
    expected = []
    for n in numbers:
        expected.append(n not in seen)
        seen.add(n)
    assert accepted == expected


def test_a_redelivered_newer_message_does_not_hide_older_readings_far_behind():
    """After a restart a broker may send a newer message first; the older ones still count."""
    tracker = SequenceTracker()
    assert all(tracker.accept(n) for n in range(1, 2951))
    assert tracker.accept(4000)
    assert all(tracker.accept(n) for n in range(2951, 4000))
    assert not any(tracker.accept(n) for n in range(1, 4001))


def test_a_checkpoint_of_the_older_form_is_read():
    tracker = SequenceTracker.from_state({"highest": 10, "missing": [3, 4, 7]})
    assert [tracker.accept(n) for n in (3, 4, 5, 7, 7, 11)] == [True, True, False, True, False, True]
