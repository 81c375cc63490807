"""Probability limits: means judged on the normal-score scale of their exact law.

References used here:
* the mean of n exponential readings of mean m is gamma(n, m / n); of n gamma(a, s) readings
  gamma(n a, s / n) (sums of independent gammas with a common scale), via scipy.stats;
* the normal tail Phi(-3) = 0.0013499 (scipy.special.ndtr);
* seeded Monte Carlo draws of in-control subgroups as the witness of the false-alarm rates.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from monitor.spc import (
    ChartKind,
    ChartSet,
    ChartSpec,
    IndividualsChart,
    ProcessParameters,
    RuleId,
    Subgroup,
    SubgroupBatch,
    XbarRChart,
    XbarSChart,
)
from monitor.spc.exact_scale import ExactScale
from monitor.spc.parents import Parent
from monitor.spc.rules import Rule

EXPONENTIAL = Parent.of("exponential", mean=2.0)
TAIL = float(special.ndtr(-3.0))


def test_limits_are_the_exact_quantiles_and_the_center_the_median():
    scale = ExactScale(EXPONENTIAL)
    law = stats.gamma(4, scale=2.0 / 4)
    center, lower, upper = scale.lines(4, 3.0)
    assert lower == pytest.approx(law.ppf(TAIL), rel=1e-9)
    assert upper == pytest.approx(law.isf(TAIL), rel=1e-9)
    assert center == pytest.approx(law.median(), rel=1e-9)


def test_normal_scores_follow_the_exact_law_in_both_tails():
    scale = ExactScale(EXPONENTIAL)
    law = stats.gamma(4, scale=0.5)
    x = np.array([0.05, 0.4, 2.0, 4.0, 7.5])
    expected = np.where(x < law.median(), special.ndtri(law.cdf(x)), -special.ndtri(law.sf(x)))
    assert scale.z_many(x, np.full(5, 4)) == pytest.approx(expected, rel=1e-9)


def test_under_a_normal_parent_the_scale_is_the_usual_one():
    scale = ExactScale(Parent.of("normal", mean=10.0, sd=2.0))
    center, lower, upper = scale.lines(4, 3.0)
    assert (center, lower, upper) == pytest.approx((10.0, 7.0, 13.0), rel=1e-9)
    assert scale.z(11.5, 4) == pytest.approx(1.5, rel=1e-9)


def _in_control(rng: np.random.Generator, subgroups: int, n: int) -> np.ndarray:
    return rng.exponential(2.0, size=(subgroups, n))


def test_probability_limits_give_the_nominal_false_alarm_rate_for_a_skewed_process():
    """Seeded witness: beyond-limits rate Phi(-3) per side; normal-theory limits give far more."""
    rng = np.random.default_rng(20261202)
    data = _in_control(rng, 400_000, 4)
    batch = SubgroupBatch.from_rows(data)
    rules = [Rule.beyond_limits()]
    exact = XbarRChart(mean=2.0, sigma=2.0, rules=rules, scale=ExactScale(EXPONENTIAL)).update_many(batch)
    normal = XbarRChart(mean=2.0, sigma=2.0, rules=rules).update_many(batch)

    def rate(result, side):
        hits = [s for s in result.signals if s.statistic.value == "mean" and s.side.value == side]
        return len(hits) / data.shape[0]

    se = math.sqrt(TAIL / data.shape[0])
    assert abs(rate(exact, "upper") - TAIL) < 4 * se
    assert abs(rate(exact, "lower") - TAIL) < 4 * se
    # normal-theory upper limit 2 + 3 * 2 / 2 = 5: gamma(4, 0.5) puts far more beyond it
    true_upper = stats.gamma(4, scale=0.5).sf(5.0)
    assert true_upper > 5 * TAIL
    assert rate(normal, "upper") == pytest.approx(true_upper, abs=4 * math.sqrt(true_upper / data.shape[0]))


def test_zone_lines_become_exact_quantiles_for_run_rules():
    """On the exact scale, a point is beyond the 2-sigma line with probability Phi(-2) per side."""
    rng = np.random.default_rng(7)
    data = _in_control(rng, 200_000, 3)
    scale = ExactScale(EXPONENTIAL)
    z = scale.z_many(data.mean(axis=1), np.full(data.shape[0], 3))
    share = float(np.mean(z > 2.0))
    expected = float(special.ndtr(-2.0))
    assert abs(share - expected) < 4 * math.sqrt(expected / data.shape[0])


@pytest.mark.parametrize("chart_class", [XbarRChart, XbarSChart])
def test_streaming_batch_and_snapshots_agree_with_probability_limits(chart_class):
    rng = np.random.default_rng(3)
    sizes = rng.integers(2, 7, size=120)
    groups = [
        tuple(float(v) for v in rng.exponential(2.0, size=n) + (0.8 if i > 90 else 0.0))
        for i, n in enumerate(sizes)
    ]

    def fresh():
        return chart_class(mean=2.0, sigma=2.0, scale=ExactScale(EXPONENTIAL))

    streaming = fresh()
    one_by_one = [s for g in groups for s in streaming.update(Subgroup(g))]
    batch = fresh().update_many(SubgroupBatch.from_subgroups([Subgroup(g) for g in groups])).signals
    assert one_by_one == batch
    assert one_by_one  # the shifted end is caught
    cut = 57
    first = fresh()
    before = [s for g in groups[:cut] for s in first.update(Subgroup(g))]
    resumed = chart_class.from_state(first.to_state())
    after = [s for g in groups[cut:] for s in resumed.update(Subgroup(g))]
    assert before + after == one_by_one


def test_individuals_use_the_law_of_one_reading():
    parent = Parent.of("gamma", shape=2.0, scale=1.5)
    chart = IndividualsChart(mean=3.0, sigma=2.1, rules=[Rule.beyond_limits()], scale=ExactScale(parent))
    upper = stats.gamma(2.0, scale=1.5).isf(TAIL)
    assert chart.update(Subgroup((upper * 0.999,))) == []
    signals = chart.update(Subgroup((upper * 1.001,)))
    assert [s.rule for s in signals] == [RuleId.BEYOND_LIMITS]
    assert signals[0].upper == pytest.approx(upper, rel=1e-9)


def test_a_chart_set_with_probability_limits_survives_its_snapshot():
    spec = ChartSpec(
        kinds=(ChartKind.XBAR_R,),
        standard=ProcessParameters(2.0, 2.0),
        exact_scale=ExactScale(EXPONENTIAL),
    )
    charts = ChartSet(spec)
    charts.update(Subgroup((1.0, 2.0, 3.0, 0.5)))
    again = ChartSet.from_state(spec, charts.to_state())
    signals = again.update(Subgroup((9.0, 8.0, 7.5, 9.5)))
    assert signals
    assert signals[0].upper == pytest.approx(stats.gamma(4, scale=0.5).isf(TAIL), rel=1e-9)
