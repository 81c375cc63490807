"""A chart's runtime in the daemon: which settings changes keep the limits and which make new ones."""

from __future__ import annotations

import json
import random
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.alerts import Alert, AlertSettings
from monitor.config import load_config_text
from monitor.daemon import ChartOutput, ChartRuntime, SequenceTracker
from monitor.signal_pvalues import LawWorkshop
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


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.lists(st.integers(min_value=0, max_value=60), min_size=1, max_size=8), min_size=1, max_size=12
    ),
    st.integers(min_value=0, max_value=3),
)
def test_runs_of_sequence_numbers_are_accepted_as_one_by_one(chunks, start):
    """accept_many gives accept's answers and leaves the same state (runs that continue the
    highest take a shortcut; the reference is accept itself)."""
    one, many = SequenceTracker(), SequenceTracker()
    offset = start * SequenceTracker.WINDOW  # also far jumps, where gaps fall out of the window
    for chunk in chunks:
        numbers = [offset + n for n in chunk]
        expected = [one.accept(n) for n in numbers]
        assert many.accept_many(np.array(numbers, dtype=np.int64)).tolist() == expected
        assert many.to_state() == one.to_state()
        consecutive = list(range(one.highest + 1, one.highest + 1 + len(chunk)))
        assert many.accept_many(np.array(consecutive, dtype=np.int64)).tolist() == [
            one.accept(n) for n in consecutive
        ]
        assert many.to_state() == one.to_state()


BATCH_TEMPLATE = """\
charts:
  - id: press/thickness
    topic: plant/press/thickness
    payload: {{format: json, batch: array}}
    subgroup: {{size: {size}}}
    kinds: {kinds}
    limits: {{mean: 8.0, sigma: 0.04}}
    rules: western-electric
"""


class BuildAtOnce(LawWorkshop):
    """Laws built when first asked for, on the caller's thread (both paths then see the same)."""

    def __init__(self) -> None:
        super().__init__()
        self.values: dict[object, object] = {}

    def get(self, key: object, build: Callable[[], object]) -> object | None:
        if key not in self.values:
            self.values[key] = build()
        return self.values[key]


AT_ONCE = BuildAtOnce()


def batch_runtime(size: int, kinds: str) -> ChartRuntime:
    config = load_config_text(BATCH_TEMPLATE.format(size=size, kinds=kinds), "plant.yaml")
    chart = config.charts[0]
    settings = AlertSettings(repeat_after_ms=1, clear_after_subgroups=3)
    return ChartRuntime(chart.id, chart, settings, workshop=AT_ONCE)


@settings(max_examples=60, deadline=None)
@given(
    st.sampled_from([(5, "[xbar_r, ewma, cusum]"), (4, "[xbar_s]"), (1, "[individuals_mr, ewma]")]),
    st.lists(
        st.tuples(st.integers(min_value=1, max_value=40), st.sampled_from([0.0, 0.0, 0.03, -0.05, 0.2])),
        min_size=1,
        max_size=12,
    ),
    st.randoms(use_true_random=False),
)
def test_batch_readings_are_charted_as_reading_by_reading(setting, stretches, rng):
    """Held batches charted in one vectorised pass give the rows, signals, alerts and state
    that feeding the same readings one by one gives (the streaming path is the reference;
    shifted stretches make signals, alerts, repeats and clearances)."""
    _charted_both_ways(*setting, stretches, rng)


def test_the_batch_comparison_sees_alerts_raised_repeated_and_cleared():
    """The comparison above is not vacuous: a shift and a return raise, repeat and clear."""
    alerts = _charted_both_ways(
        5, "[xbar_r, ewma, cusum]", [(60, 0.0), (40, 0.3), (200, 0.0)], random.Random(4)
    )
    assert {"raised", "repeated", "cleared"} <= {alert.kind.value for alert in alerts}


def _charted_both_ways(
    size: int, kinds: str, stretches: list[tuple[int, float]], rng: random.Random
) -> list[Alert]:
    noise = [
        0.1 * (rng.random() + rng.random() + rng.random() - 1.5) for _ in range(sum(c for c, _ in stretches))
    ]
    values = [8.0 + shift + noise.pop() for count, shift in stretches for _ in range(count)]
    times = [1_767_600_000.0 + 0.5 * i + rng.random() for i in range(len(values))]
    streamed, batched = batch_runtime(size, kinds), batch_runtime(size, kinds)
    assert batched.batches
    expected, got = ChartOutput(), ChartOutput()
    now_ms = 1_767_700_000_000
    chunk: list[Reading] = []
    cut = 0
    while cut < len(values):  # batches of random length, charted now and then as the clock moves
        part = slice(cut, cut + rng.randint(1, 30))
        batched.hold(np.array(values[part]), np.array(times[part]))
        chunk += [Reading(v, t) for v, t in zip(values[part], times[part], strict=True)]
        cut = part.stop
        if rng.random() < 0.5 or cut >= len(values):
            now_ms += rng.choice([0, 1, 5])
            batched.chart_held(now_ms, got)
            streamed.feed(chunk, now_ms, expected)
            chunk = []
            assert batched.status_dirty == streamed.status_dirty  # the retained status is sent again
            batched.status_dirty = streamed.status_dirty = False
    assert got.subgroups + [row for block in got.blocks for row in block.rows()] == expected.subgroups
    assert got.signals == expected.signals
    assert [a.event for a in got.alerts] == [a.event for a in expected.alerts]
    assert got.limits == expected.limits
    assert batched.to_state() == streamed.to_state()
    assert batched.status(now_ms) == streamed.status(now_ms)
    return got.alerts
