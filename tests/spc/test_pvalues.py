"""p-values of signals under a normal in-control process, against scipy and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.spc import (
    IndividualsChart,
    Rule,
    RuleSet,
    Subgroup,
    XbarRChart,
    XbarSChart,
    nelson,
    p_value,
    pattern_probability,
)
from monitor.spc.constants import range_cdf
from monitor.spc.pvalues import range_tail


@pytest.mark.parametrize(("n", "w"), [(2, 0.5), (2, 3.0), (3, 4.0), (5, 4.5), (10, 5.2), (25, 6.0)])
def test_range_law_matches_scipy_studentized_range_with_infinite_degrees_of_freedom(n, w):
    """The normal range law equals scipy's studentized range with infinite degrees of freedom."""
    # scipy.stats.studentized_range(k, df): with df = inf the denominator is the true sigma,
    # so the law is that of R / sigma for k normal readings.
    assert range_cdf(w, n) == pytest.approx(stats.studentized_range.cdf(w, n, np.inf), abs=1e-9)
    assert range_tail(w, n) == pytest.approx(stats.studentized_range.sf(w, n, np.inf), abs=1e-9)


def test_beyond_limits_p_value_of_a_mean_is_the_normal_tail_on_its_side():
    """A mean beyond its upper limit gets P(Z >= z) under the normal model (closed form)."""
    chart = XbarRChart(mean=10.0, sigma=1.0)
    (signal,) = chart.update(Subgroup((11.6, 11.4, 11.9, 11.5, 11.3)))
    result = p_value(signal, n=5)
    assert result.method == "closed form"
    assert result.parent == "normal"
    assert result.value == pytest.approx(stats.norm.sf(signal.z), rel=1e-12)


def test_a_low_individual_gets_the_lower_tail():
    """A reading below its lower limit gets P(Z <= z)."""
    chart = IndividualsChart(mean=0.0, sigma=2.0)
    (signal,) = chart.update(Subgroup((-7.0,)))
    assert p_value(signal, n=1).value == pytest.approx(stats.norm.cdf(-3.5), rel=1e-12)


def test_a_wide_standard_deviation_gets_the_chi_square_tail():
    """(n - 1) S^2 / sigma^2 is chi-square with n - 1 degrees of freedom (common practice, no source)."""
    chart = XbarSChart(mean=0.0, sigma=1.0, rules=(Rule.beyond_limits(),))
    signals = chart.update(Subgroup((-2.9, 2.8, -2.5, 2.6)))
    (signal,) = [s for s in signals if s.statistic.value == "sd"]
    expected = stats.chi2.sf(3 * signal.value**2, df=3)
    assert p_value(signal, n=4).value == pytest.approx(expected, rel=1e-9)


def test_a_wide_range_gets_the_exact_range_tail():
    """A range beyond its limit gets P(R >= r) from the normal range law."""
    chart = XbarRChart(mean=0.0, sigma=1.0, rules=(Rule.beyond_limits(),))
    signals = chart.update(Subgroup((-3.0, 3.1, 0.2, 0.0, 0.1)))
    (signal,) = [s for s in signals if s.statistic.value == "range"]
    expected = stats.studentized_range.sf(signal.value, 5, np.inf)
    result = p_value(signal, n=5)
    assert result.value == pytest.approx(expected, abs=1e-9)
    assert result.method == "numerical integration"


def test_pattern_probabilities_of_the_nelson_rules_have_their_closed_forms():
    """Each run rule's completion probability equals its closed form for independent points."""
    q1, q2, q3 = (stats.norm.sf(s) for s in (1.0, 2.0, 3.0))
    expected = {
        "beyond_limits": 2 * q3,
        "same_side_run": 2 * 0.5**9,
        "steady_trend": 2 / math.factorial(6),
        # 199360981 alternating permutations of 14 in one direction (Euler zigzag number)
        "alternating_run": 2 * 199360981 / math.factorial(14),
        "outer_zone_cluster": 2 * q2 * (1 - (1 - q2) ** 2),
        "middle_zone_cluster": 2 * q1 * stats.binom.sf(2, 4, q1),
        "hugging_center": (1 - 2 * q1) ** 15,
        "avoiding_center": (2 * q1) ** 8 - 2 * q1**8,
    }
    for rule in nelson():
        assert pattern_probability(rule) == pytest.approx(expected[rule.id.value], rel=1e-12), rule.id


def test_pattern_probabilities_match_a_seeded_simulation():
    """Firings per point of each Nelson rule on iid normal points match its pattern probability."""
    rng = np.random.default_rng(20261202)
    z = rng.standard_normal(2_000_000)
    hits = RuleSet(nelson()).scan(z, first_index=0)
    for rule in nelson():
        count = sum(1 for h in hits if h.rule is rule.id)
        p = pattern_probability(rule)
        # overlapping patterns make counts positively correlated; allow 6 binomial errors plus 15 %
        se = math.sqrt(p * (1 - p) / z.shape[0])
        assert abs(count / z.shape[0] - p) < 6 * se + 0.15 * p, (rule.id, count, p * z.shape[0])


def test_run_rule_signals_carry_their_pattern_probability():
    """A run-rule signal's p-value is the probability of its pattern, by closed form."""
    chart = IndividualsChart(mean=0.0, sigma=1.0)
    signals = []
    for x in (0.5, 0.4, 0.6, 0.3, 0.7, 0.2, 0.8, 0.4):
        signals.extend(chart.update(Subgroup((x,))))
    (signal,) = signals
    result = p_value(signal, n=1, rules=chart.rules)
    assert result.value == pytest.approx(2 * 0.5**8)
    assert result.method == "closed form"
