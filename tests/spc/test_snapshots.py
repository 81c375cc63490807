"""Snapshots restore exactly, and refuse what they cannot restore.

Every object is run once without interruption; then, at every cut point, its snapshot is sent
through strict JSON text, restored, and continued: the signals (or subgroups) and the final
snapshot must equal those of the uninterrupted run exactly.
"""

from __future__ import annotations

import copy

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from monitor.spc import (
    BaselinePlan,
    ChartKind,
    ChartSet,
    ChartSpec,
    CountSubgrouper,
    CusumChart,
    EwmaChart,
    IndividualsChart,
    MonitorError,
    PChart,
    ProcessParameters,
    Reading,
    RuleId,
    RuleSet,
    StateError,
    Subgroup,
    SubgroupBatch,
    UChart,
    WindowSubgrouper,
    XbarRChart,
    XbarSChart,
    nelson,
)
from tests.spc.chart_cases import (
    CHART_KINDS,
    chart_case,
    chart_set_case,
    run_streaming,
    signal_key,
    state_text,
    through_json,
    z_sequence,
)

PROPERTY = settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    # shrink to a minimal example, but skip the slow 'explain' annotations
    phases=[phase for phase in Phase if phase is not Phase.explain],
)


def _subgroup_key(subgroup: Subgroup | None) -> tuple[object, ...] | None:
    if subgroup is None:
        return None
    return (
        tuple(v.hex() for v in subgroup.values),
        subgroup.start,
        subgroup.end,
        subgroup.exposures,
    )


# ---------------------------------------------------------------- charts


@pytest.mark.parametrize("kind", CHART_KINDS)
@PROPERTY
@given(data=st.data())
def test_a_chart_restored_from_json_at_any_cut_continues_exactly_like_an_uninterrupted_run(kind, data):
    """Snapshot, JSON, restore and continue at every cut: same signals and final state."""
    config, subgroups = data.draw(chart_case(kind, max_subgroups=30), label="case")
    uninterrupted = run_streaming(config.build(), subgroups)
    reference = config.build()
    chart_type = type(reference)
    snapshots = [through_json(reference.to_state())]
    signals_at: list[list[tuple[object, ...]]] = []
    for subgroup in subgroups:
        signals_at.append([signal_key(s) for s in reference.update(subgroup)])
        snapshots.append(through_json(reference.to_state()))
    assert [k for step in signals_at for k in step] == uninterrupted.signals
    for cut, snapshot in enumerate(snapshots):
        restored = chart_type.from_state(copy.deepcopy(snapshot))
        assert state_text(restored.to_state()) == state_text(snapshot), f"restore at {cut}"
        resumed = [signal_key(s) for g in subgroups[cut:] for s in restored.update(g)]
        assert resumed == [k for step in signals_at[cut:] for k in step], f"signals after {cut}"
        assert state_text(restored.to_state()) == uninterrupted.state, f"final state after {cut}"


@pytest.mark.parametrize("kind", CHART_KINDS)
@PROPERTY
@given(data=st.data())
def test_a_restored_chart_continues_a_batch_exactly_like_the_chart_it_was_taken_from(kind, data):
    """A restored chart and its original give identical batch results on the rest of the run."""
    config, subgroups = data.draw(chart_case(kind, max_subgroups=30), label="case")
    cut = data.draw(st.integers(0, len(subgroups)), label="cut")
    original = config.build()
    for subgroup in subgroups[:cut]:
        original.update(subgroup)
    restored = type(original).from_state(through_json(original.to_state()))
    rest = SubgroupBatch.from_subgroups(subgroups[cut:])
    want = original.update_many(rest)
    got = restored.update_many(rest)
    assert [signal_key(s) for s in got.signals] == [signal_key(s) for s in want.signals]
    assert state_text(restored.to_state()) == state_text(original.to_state())


# ---------------------------------------------------------------- rule sets


@PROPERTY
@given(z=z_sequence())
def test_a_nelson_rule_set_restored_at_any_cut_continues_exactly_like_an_uninterrupted_one(z):
    """All eight Nelson rules: restore at every cut gives the remaining hits and final state."""
    reference = RuleSet(nelson())
    snapshots = [through_json(reference.to_state())]
    hits_at = []
    for i, value in enumerate(z):
        hits_at.append(reference.update(value, index=i))
        snapshots.append(through_json(reference.to_state()))
    final = state_text(reference.to_state())
    for cut, snapshot in enumerate(snapshots):
        restored = RuleSet.from_state(snapshot)
        resumed = [h for i in range(cut, len(z)) for h in restored.update(z[i], index=i)]
        assert resumed == [h for step in hits_at[cut:] for h in step], f"hits after {cut}"
        assert state_text(restored.to_state()) == final, f"final state after {cut}"


def test_the_z_generator_makes_all_eight_nelson_rules_fire():
    """Across 60 derandomized generated sequences every Nelson rule fires at least once."""
    fired: set[RuleId] = set()

    @settings(max_examples=60, derandomize=True, database=None, deadline=None)
    @given(z=z_sequence())
    def survey(z):
        rules = RuleSet(nelson())
        fired.update(h.rule for i, v in enumerate(z) for h in rules.update(v, index=i))

    survey()
    assert fired == set(RuleId), set(RuleId) - fired


# ---------------------------------------------------------------- chart sets


@pytest.mark.parametrize("limits", ["standard", "baseline"])
@PROPERTY
@given(data=st.data())
def test_a_chart_set_restored_at_any_cut_continues_exactly_like_an_uninterrupted_one(limits, data):
    """Chart sets, during and after the baseline: restore at every cut continues exactly."""
    spec, subgroups = data.draw(chart_set_case(limits, max_subgroups=30), label="case")
    uninterrupted = run_streaming(ChartSet(spec), subgroups)
    reference = ChartSet(spec)
    snapshots = [through_json(reference.to_state())]
    signals_at: list[list[tuple[object, ...]]] = []
    for subgroup in subgroups:
        try:
            step = reference.update(subgroup)
        except MonitorError:
            # a degenerate baseline is refused; the cuts before it are still checked
            break
        signals_at.append([signal_key(s) for s in step])
        snapshots.append(through_json(reference.to_state()))
    done = len(signals_at)
    final = state_text(reference.to_state()) if uninterrupted.error is None else None
    for cut, snapshot in enumerate(snapshots):
        restored = ChartSet.from_state(spec, copy.deepcopy(snapshot))
        assert state_text(restored.to_state()) == state_text(snapshot), f"restore at {cut}"
        assert restored.monitoring == (cut >= getattr(spec.baseline, "subgroups", 0))
        resumed = [signal_key(s) for g in subgroups[cut:done] for s in restored.update(g)]
        assert resumed == [k for step in signals_at[cut:] for k in step], f"signals after {cut}"
        if final is not None:
            assert state_text(restored.to_state()) == final, f"final state after {cut}"


def test_a_chart_set_snapshot_taken_mid_baseline_finishes_the_baseline_identically():
    """Restoring mid-baseline gives the same Phase I estimate and signals as no restore."""
    spec = ChartSpec(
        kinds=(ChartKind.XBAR_S, ChartKind.EWMA, ChartKind.CUSUM),
        baseline=BaselinePlan(subgroups=6),
    )
    rows = [
        (9.8, 10.1, 10.3),
        (10.2, 9.9, 10.0),
        (10.4, 10.1, 9.7),
        (9.9, 10.0, 10.2),
        (10.6, 9.8, 10.1),
        (10.0, 10.3, 9.9),
        (11.9, 12.2, 11.8),
        (10.1, 9.9, 10.0),
    ]
    plain = ChartSet(spec)
    expected = [s for r in rows for s in plain.update(Subgroup(r))]
    first = ChartSet(spec)
    for r in rows[:3]:
        first.update(Subgroup(r))
    second = ChartSet.from_state(spec, through_json(first.to_state()))
    assert not second.monitoring
    assert second.baseline_collected == 3
    got = [s for r in rows[3:] for s in second.update(Subgroup(r))]
    assert got == expected
    assert expected  # the shifted subgroup signals
    assert second.estimate == plain.estimate


# ---------------------------------------------------------------- subgroupers


_READINGS = st.lists(
    st.tuples(
        st.floats(-1e3, 1e3),
        st.floats(0.0, 600.0),
        st.none() | st.floats(0.5, 10.0),
    ),
    max_size=40,
).map(lambda items: [Reading(v, time=t, exposure=e) for v, t, e in items])


@PROPERTY
@given(size=st.integers(1, 5), readings=_READINGS)
def test_a_count_subgrouper_restored_at_any_cut_continues_exactly(size, readings):
    """Count subgroups: restore at every cut gives the remaining subgroups and final state."""
    reference = CountSubgrouper(size=size)
    snapshots = [through_json(reference.to_state())]
    out = []
    for reading in readings:
        out.append(_subgroup_key(reference.add(reading)))
        snapshots.append(through_json(reference.to_state()))
    final = state_text(reference.to_state())
    for cut, snapshot in enumerate(snapshots):
        restored = CountSubgrouper.from_state(snapshot)
        assert restored.pending == cut % size
        assert [_subgroup_key(restored.add(r)) for r in readings[cut:]] == out[cut:]
        assert state_text(restored.to_state()) == final


_WINDOW_STEPS = st.lists(
    st.one_of(
        st.tuples(st.just("add"), st.floats(-5.0, 5.0), st.floats(0.0, 900.0)),
        st.tuples(st.just("advance"), st.just(0.0), st.floats(0.0, 1000.0)),
    ),
    max_size=40,
)


def _window_step(grouper: WindowSubgrouper, step: tuple[str, float, float]) -> list[object]:
    action, value, time = step
    if action == "add":
        closed = grouper.add(Reading(value, time=time))
    else:
        closed = grouper.advance(time)
    return [_subgroup_key(s) for s in closed]


@PROPERTY
@given(
    width=st.sampled_from([10.0, 60.0, 37.5]),
    min_size=st.integers(1, 3),
    lateness=st.sampled_from([0.0, 5.0, 45.0]),
    origin=st.sampled_from([0.0, 7.25, -30.0]),
    max_open=st.integers(1, 4),
    steps=_WINDOW_STEPS,
)
def test_a_window_subgrouper_restored_at_any_cut_continues_exactly(
    width, min_size, lateness, origin, max_open, steps
):
    """Time windows: restore at every cut gives the same closed windows, counters and state."""

    def fresh() -> WindowSubgrouper:
        return WindowSubgrouper(
            width=width, min_size=min_size, lateness=lateness, origin=origin, max_open=max_open
        )

    reference = fresh()
    snapshots = [through_json(reference.to_state())]
    out = []
    for step in steps:
        out.append(_window_step(reference, step))
        snapshots.append(through_json(reference.to_state()))
    flushed = [_subgroup_key(s) for s in reference.flush()]
    final = state_text(reference.to_state())
    for cut, snapshot in enumerate(snapshots):
        restored = WindowSubgrouper.from_state(snapshot)
        assert [_window_step(restored, s) for s in steps[cut:]] == out[cut:]
        assert [_subgroup_key(s) for s in restored.flush()] == flushed
        assert restored.stats == reference.stats
        assert state_text(restored.to_state()) == final


# ---------------------------------------------------------------- refusals


def _samples() -> dict[str, tuple[type, object]]:
    """One object of every snapshotting class, each with some history."""
    xbar_r = XbarRChart(mean=10.0, sigma=1.0)
    xbar_s = XbarSChart(mean=10.0, sigma=1.0)
    for chart in (xbar_r, xbar_s):
        chart.update(Subgroup((10.2, 9.7, 11.0)))
    individuals = IndividualsChart(mean=0.0, sigma=1.0)
    ewma = EwmaChart(mean=0.0, sigma=1.0)
    cusum = CusumChart(mean=0.0, sigma=1.0)
    for chart in (individuals, ewma, cusum):
        chart.update(Subgroup((0.4,)))
    p = PChart(proportion=0.1)
    p.update(Subgroup((3.0,), exposures=(40.0,)))
    u = UChart(rate=2.0)
    u.update(Subgroup((5.0,), exposures=(2.0,)))
    rules = RuleSet(nelson())
    rules.update(1.2, index=0)
    count = CountSubgrouper(size=3)
    count.add(Reading(1.0, time=0.0))
    window = WindowSubgrouper(width=60.0)
    window.add(Reading(1.0, time=5.0))
    spec = ChartSpec(kinds=(ChartKind.XBAR_R,), standard=ProcessParameters(10.0, 1.0))
    chart_set = ChartSet(spec)
    chart_set.update(Subgroup((10.0, 10.5)))
    return {
        "xbar_r": (XbarRChart, xbar_r),
        "xbar_s": (XbarSChart, xbar_s),
        "individuals_mr": (IndividualsChart, individuals),
        "ewma": (EwmaChart, ewma),
        "cusum": (CusumChart, cusum),
        "p": (PChart, p),
        "u": (UChart, u),
        "rule_set": (RuleSet, rules),
        "count_subgrouper": (CountSubgrouper, count),
        "window_subgrouper": (WindowSubgrouper, window),
        "chart_set": (ChartSet, chart_set),
    }


_SPEC = ChartSpec(kinds=(ChartKind.XBAR_R,), standard=ProcessParameters(10.0, 1.0))


def _restore(cls: type, state: dict) -> object:  # type: ignore[type-arg]
    if cls is ChartSet:
        return ChartSet.from_state(_SPEC, state)
    return cls.from_state(state)  # type: ignore[attr-defined]


_PAIRS = [
    ("xbar_r", "xbar_s"),
    ("xbar_s", "xbar_r"),
    ("individuals_mr", "ewma"),
    ("ewma", "cusum"),
    ("cusum", "ewma"),
    ("p", "u"),
    ("u", "p"),
    ("rule_set", "chart_set"),
    ("count_subgrouper", "window_subgrouper"),
    ("window_subgrouper", "count_subgrouper"),
    ("chart_set", "xbar_r"),
]


@pytest.mark.parametrize(("target", "source"), _PAIRS)
def test_restoring_a_snapshot_of_another_kind_raises_state_error_naming_both_kinds(target, source):
    """A snapshot of another kind is refused with a StateError that names both kinds."""
    samples = _samples()
    cls = samples[target][0]
    state = through_json(samples[source][1].to_state())  # type: ignore[attr-defined]
    with pytest.raises(StateError) as info:
        _restore(cls, state)
    assert repr(source) in str(info.value)
    assert repr(target) in str(info.value)


@pytest.mark.parametrize("name", sorted(_samples()))
def test_restoring_a_snapshot_of_a_newer_schema_raises_state_error_saying_so(name):
    """A snapshot written by a newer schema is refused with a message naming both schemas."""
    cls, obj = _samples()[name]
    state = through_json(obj.to_state())  # type: ignore[attr-defined]
    current = state["schema"]
    assert isinstance(current, int)
    state["schema"] = current + 1
    with pytest.raises(StateError, match=rf"schema {current + 1}.*reads up to {current}"):
        _restore(cls, state)


@pytest.mark.parametrize("name", sorted(_samples()))
def test_restoring_a_snapshot_of_the_current_schema_gives_the_same_snapshot(name):
    """Control for the refusals: the unmodified snapshot restores to itself."""
    cls, obj = _samples()[name]
    state = through_json(obj.to_state())  # type: ignore[attr-defined]
    assert state_text(_restore(cls, state).to_state()) == state_text(state)  # type: ignore[attr-defined]


def test_a_chart_set_snapshot_holding_a_chart_of_a_newer_schema_is_refused():
    """A newer schema nested inside a chart set snapshot is refused too."""
    state = through_json(_samples()["chart_set"][1].to_state())  # type: ignore[attr-defined]
    charts = state["charts"]
    assert isinstance(charts, list)
    assert isinstance(charts[0], dict)
    charts[0]["schema"] = 99
    with pytest.raises(StateError, match="schema 99"):
        ChartSet.from_state(_SPEC, state)


@pytest.mark.parametrize(
    "other",
    [
        (ChartKind.XBAR_S,),
        (ChartKind.XBAR_R,),
        (ChartKind.XBAR_R, ChartKind.EWMA, ChartKind.CUSUM),
        (ChartKind.EWMA, ChartKind.XBAR_R),
    ],
    ids=["other", "fewer", "more", "reordered"],
)
def test_a_chart_set_snapshot_restored_under_a_spec_with_other_kinds_raises_state_error(other):
    """Restoring a monitoring chart set under other (or reordered) kinds names both lists."""
    spec = ChartSpec(kinds=(ChartKind.XBAR_R, ChartKind.EWMA), standard=ProcessParameters(10.0, 1.0))
    chart_set = ChartSet(spec)
    chart_set.update(Subgroup((10.0, 10.4, 9.9)))
    state = through_json(chart_set.to_state())
    changed = ChartSpec(kinds=other, standard=ProcessParameters(10.0, 1.0))
    with pytest.raises(StateError) as info:
        ChartSet.from_state(changed, state)
    message = str(info.value)
    assert "'xbar_r'" in message
    assert all(repr(k.value) in message for k in other)
