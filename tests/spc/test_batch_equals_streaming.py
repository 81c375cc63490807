"""The vectorised path of every chart equals its streaming path, bit for bit.

For each chart kind and for chart sets, a hypothesis-generated sequence of subgroups is fed
once with ``update`` in a loop and once in random chunks through ``update_many`` (or a mix
of both); signals, plotted points (NaN limit in a trace is None in a point), the latest
points after every chunk, and the final snapshot must be identical.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from monitor.spc import (
    BaselinePlan,
    ChartKind,
    ChartSet,
    ChartSpec,
    CusumChart,
    IndividualsChart,
    ProcessParameters,
    RuleId,
    RuleSet,
    Side,
    Subgroup,
    SubgroupBatch,
    nelson,
)
from monitor.spc.charts.cusum import REBASE_EVERY
from tests.spc.chart_cases import (
    CHART_KINDS,
    assert_same_run,
    chart_case,
    chart_set_case,
    chunk_plan,
    run_chunked,
    run_streaming,
    z_sequence,
)

PROPERTY = settings(
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    # shrink to a minimal example, but skip the slow 'explain' annotations
    phases=[phase for phase in Phase if phase is not Phase.explain],
)
SURVEY = settings(
    max_examples=40,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=list(HealthCheck),
)


# ---------------------------------------------------------------- charts


@pytest.mark.parametrize("kind", CHART_KINDS)
@PROPERTY
@given(data=st.data())
def test_update_many_over_random_chunks_gives_exactly_the_streaming_results(kind, data):
    """update_many over random chunks gives the signals, points and state of update in a loop."""
    config, subgroups = data.draw(chart_case(kind), label="case")
    plan = data.draw(chunk_plan(len(subgroups), mixed=False), label="chunks")
    streamed = run_streaming(config.build(), subgroups)
    chunked = run_chunked(config.build(), subgroups, plan)
    assert_same_run(streamed, chunked)


@pytest.mark.parametrize("kind", CHART_KINDS)
@PROPERTY
@given(data=st.data())
def test_mixing_streaming_and_batch_chunks_gives_exactly_the_streaming_results(kind, data):
    """Streaming some stretches and batching others gives the results of streaming them all."""
    config, subgroups = data.draw(chart_case(kind), label="case")
    plan = data.draw(chunk_plan(len(subgroups), mixed=True), label="chunks")
    streamed = run_streaming(config.build(), subgroups)
    chunked = run_chunked(config.build(), subgroups, plan)
    assert_same_run(streamed, chunked)


@pytest.mark.parametrize("kind", CHART_KINDS)
def test_the_generator_makes_every_chart_signal_in_a_good_share_of_examples(kind):
    """Across 40 derandomized generated sequences, at least a quarter raise signals on each chart."""
    outcomes: list[bool] = []
    sides: set[str] = set()

    @SURVEY
    @given(case=chart_case(kind))
    def survey(case):
        config, subgroups = case
        run = run_streaming(config.build(), subgroups)
        outcomes.append(bool(run.signals))
        sides.update(s.side.value for s in run.raw_signals)

    survey()
    assert len(outcomes) >= 20
    assert sum(outcomes) >= len(outcomes) / 4
    assert {"upper", "lower"} <= sides


# ---------------------------------------------------------------- chart sets


@pytest.mark.parametrize("limits", ["standard", "baseline"])
@PROPERTY
@given(data=st.data())
def test_chart_set_update_many_over_random_chunks_gives_exactly_the_streaming_results(limits, data):
    """A chart set of several kinds gives the same results in random batch chunks as streamed."""
    spec, subgroups = data.draw(chart_set_case(limits), label="case")
    plan = data.draw(chunk_plan(len(subgroups), mixed=False), label="chunks")
    streamed = run_streaming(ChartSet(spec), subgroups)
    chunked = run_chunked(ChartSet(spec), subgroups, plan)
    assert_same_run(streamed, chunked)


@pytest.mark.parametrize("limits", ["standard", "baseline"])
@PROPERTY
@given(data=st.data())
def test_chart_set_mixing_streaming_and_batch_chunks_gives_exactly_the_streaming_results(limits, data):
    """A chart set fed partly streamed, partly batched gives the results of streaming it all."""
    spec, subgroups = data.draw(chart_set_case(limits), label="case")
    plan = data.draw(chunk_plan(len(subgroups), mixed=True), label="chunks")
    streamed = run_streaming(ChartSet(spec), subgroups)
    chunked = run_chunked(ChartSet(spec), subgroups, plan)
    assert_same_run(streamed, chunked)


@pytest.mark.parametrize("limits", ["standard", "baseline"])
def test_the_generator_makes_chart_sets_signal_in_a_good_share_of_examples(limits):
    """Across 40 derandomized generated chart sets, at least a quarter raise signals."""
    outcomes: list[bool] = []

    @SURVEY
    @given(case=chart_set_case(limits))
    def survey(case):
        spec, subgroups = case
        outcomes.append(bool(run_streaming(ChartSet(spec), subgroups).signals))

    survey()
    assert len(outcomes) >= 20
    assert sum(outcomes) >= len(outcomes) / 4


def test_a_chart_set_batch_that_completes_the_baseline_charts_the_rest_of_that_batch():
    """One batch spanning the end of the baseline charts exactly the subgroups after it."""
    rng = np.random.default_rng(7)
    rows = rng.normal(10.0, 1.0, size=(14, 4))
    rows[11] += 6.0  # far above any limit the baseline can give
    spec = ChartSpec(kinds=(ChartKind.XBAR_R, ChartKind.CUSUM), baseline=BaselinePlan(subgroups=10))
    streamed = ChartSet(spec)
    expected = [s for row in rows for s in streamed.update(Subgroup(tuple(row)))]
    batched = ChartSet(spec)
    result = batched.update_many(SubgroupBatch.from_rows(rows))
    assert result.established is not None
    assert result.established == streamed.estimate
    assert result.signals == expected
    assert any(s.subgroup == 11 for s in expected)
    assert {int(i) for t in result.traces.values() for tr in t.values() for i in tr.subgroup} == {
        10,
        11,
        12,
        13,
    }


# ---------------------------------------------------------------- rule sets


@PROPERTY
@given(data=st.data())
def test_rule_set_scans_and_updates_in_random_chunks_give_the_hits_of_updates_alone(data):
    """All Nelson rules: any mix of scan chunks and single updates gives the hits of updates."""
    z = data.draw(z_sequence(), label="z")
    plan = data.draw(chunk_plan(len(z), mixed=True), label="chunks")
    streamed = RuleSet(nelson())
    expected = [h for i, v in enumerate(z) for h in streamed.update(v, index=i)]
    mixed = RuleSet(nelson())
    hits = []
    for begin, stop, batched in plan:
        if batched:
            hits += mixed.scan(z[begin:stop], first_index=begin)
        else:
            hits += [h for i in range(begin, stop) for h in mixed.update(z[i], index=i)]
    assert hits == expected
    assert mixed.to_state() == streamed.to_state()


def test_four_of_five_beyond_one_sigma_fires_at_the_fourth_point_streamed_and_batched():
    """Four points beyond 1 sigma from the start complete the 4-of-5 pattern in both paths."""
    z = [1.5, 1.5, 1.5, 1.5]
    streamed = RuleSet(nelson())
    stream_hits = [h for i, v in enumerate(z) for h in streamed.update(v, index=i)]
    batch_hits = RuleSet(nelson()).scan(z, first_index=0)
    wanted = (3, RuleId.MIDDLE_ZONE_CLUSTER, Side.UPPER, (0, 1, 2, 3))
    assert wanted in [(h.index, h.rule, h.side, h.subgroups) for h in batch_hits]
    assert wanted in [(h.index, h.rule, h.side, h.subgroups) for h in stream_hits]


@pytest.mark.parametrize("span", [4, 5])
@pytest.mark.parametrize("cut", [1, 2, 3])
def test_individuals_moving_ranges_over_longer_spans_carry_across_batches(span, cut):
    """Spans above 3: moving ranges straddling two batches equal the streamed ones."""
    values = [Subgroup((v,)) for v in (1.0, 2.0, 7.0, 3.0, 4.0, 0.5, 6.0)]
    streamed = run_streaming(IndividualsChart(mean=3.0, sigma=1.0, moving_range_span=span), values)
    chunked = run_chunked(
        IndividualsChart(mean=3.0, sigma=1.0, moving_range_span=span),
        values,
        [(0, cut, True), (cut, len(values), True)],
    )
    assert_same_run(streamed, chunked)


# ---------------------------------------------------------------- CUSUM re-basing


def _long_run(seed: int) -> tuple[list[Subgroup], list[float]]:
    """Two re-basings and a bit: in control (the sums drift down) with short upward shifts."""
    rng = np.random.default_rng(seed)
    m = 2 * REBASE_EVERY + 700
    sizes = rng.integers(1, 4, size=m)
    shifts = np.zeros(m)
    for start in (300, REBASE_EVERY - 6, 6000, 2 * REBASE_EVERY - 3, 2 * REBASE_EVERY + 400):
        shifts[start : start + 10] = 2.5
    subgroups = [
        Subgroup(tuple(rng.normal(20.0 + 0.8 * shift, 0.8, size=int(n))))
        for n, shift in zip(sizes, shifts, strict=True)
    ]
    return subgroups, [float(s) for s in shifts]


@pytest.mark.parametrize("head_start", [0.0, 2.5])
@pytest.mark.parametrize(
    "plan",
    [
        # batch chunks with boundaries off the re-basing points, streaming across them
        [
            (0, 1500, True),
            (1500, 4090, True),
            (4090, 4100, False),
            (4100, 8190, True),
            (8190, 8200, False),
            (8200, 2 * REBASE_EVERY + 700, True),
        ],
        # one batch across both re-basings, starting at an unaligned point
        [(0, 7, False), (7, 2 * REBASE_EVERY + 700, True)],
        # batches that straddle each re-basing point
        [
            (0, 4000, True),
            (4000, 4200, True),
            (4200, 8000, True),
            (8000, 8500, True),
            (8500, 2 * REBASE_EVERY + 700, True),
        ],
    ],
    ids=["mixed", "one-batch", "straddling"],
)
def test_cusum_re_basing_every_4096_subgroups_keeps_batch_and_streaming_identical(head_start, plan):
    """Across two re-basings of the CUSUM sums, chunked updates equal streaming bit for bit."""
    subgroups, _ = _long_run(11)
    chart = CusumChart(mean=20.0, sigma=0.8, k=0.5, h=5.0, head_start=head_start)
    streamed = run_streaming(chart, subgroups)
    chunked = run_chunked(
        CusumChart(mean=20.0, sigma=0.8, k=0.5, h=5.0, head_start=head_start), subgroups, plan
    )
    assert_same_run(streamed, chunked)
    # the run is not vacuous: signals on both sides of each re-basing point ...
    at = [s.subgroup for s in streamed.raw_signals]
    for boundary in (REBASE_EVERY, 2 * REBASE_EVERY):
        assert any(boundary - 20 <= i < boundary for i in at)
        assert any(boundary <= i < boundary + 20 for i in at)
    # ... and the sums really were re-based: the stored total is far from the plain sum
    state = chart.to_state()["state"]
    assert isinstance(state, dict)
    plain = head_start + sum((sum(s.values) / s.n - 20.0) / (0.8 / np.sqrt(s.n)) - 0.5 for s in subgroups)
    assert abs(float(state["upper_total"])) < abs(plain) / 4  # type: ignore[arg-type]


def test_a_chart_set_of_standard_values_is_unchanged_by_empty_batches():
    """update_many on an empty batch adds nothing and changes no state."""
    spec = ChartSpec(kinds=(ChartKind.XBAR_S, ChartKind.EWMA), standard=ProcessParameters(5.0, 0.5))
    charts = ChartSet(spec)
    charts.update(Subgroup((5.1, 4.8, 5.3)))
    before = charts.to_state()
    result = charts.update_many(SubgroupBatch.from_subgroups([]))
    assert result.signals == []
    assert result.traces == {}
    assert charts.to_state() == before
