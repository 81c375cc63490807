"""p-values of signals under a normal in-control process.

Each signal gets the probability, with the process in control, of what it reports:

* a point beyond its limits: the tail probability of its statistic beyond the observed value,
  on the side it signalled (mean, individual, EWMA: normal; S: chi-square; range and moving
  range: the exact law of the normal range; p and u charts: the normal approximation);
* a run rule: the probability that its pattern completes at a given subgroup of a long
  in-control sequence (either side), from the closed forms for independent continuous readings;
* CUSUM: not here; the tail of the sum's stationary law is a Markov chain
  (:func:`monitor.spc.arl.cusum_tail_curve`), which the daemon builds once per chart.

Each result names its method and the parent model (here always ``normal``). Exact laws for
non-normal processes are in :mod:`monitor.spc.laws`.

Examples:
    >>> from monitor.spc import IndividualsChart, Subgroup
    >>> chart = IndividualsChart(mean=0.0, sigma=1.0)
    >>> signal = chart.update(Subgroup((3.5,)))[0]
    >>> result = p_value(signal, n=1)
    >>> round(result.value, 6), result.method
    (0.000233, 'closed form')
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache

from scipy import special

from monitor.spc.constants import c4, d2, range_cdf
from monitor.spc.rules import Rule
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.types import Statistic

__all__ = ["PValue", "p_value", "pattern_probability", "range_tail"]

NORMAL = "normal"


@dataclass(frozen=True, slots=True)
class PValue:
    """A p-value, how it was obtained, and under which in-control model."""

    value: float | None
    method: str
    parent: str = NORMAL


def _upper_tail(z: float) -> float:
    return float(special.ndtr(-z))


@cache
def _zigzag(n: int) -> int:
    """Euler zigzag number: alternating permutations of n items, one direction (boustrophedon)."""
    row = [1]
    for _ in range(n):
        nxt = [0]
        for value in reversed(row):
            nxt.append(nxt[-1] + value)
        row = nxt
    return row[-1]


def pattern_probability(rule: Rule, limit_sigma: float = 3.0) -> float:
    """Probability that ``rule``'s pattern completes at a given point of an in-control sequence.

    For independent standard normal points, long after the start.

    Examples:
        >>> round(pattern_probability(Rule.same_side_run(8)), 6)  # 2 * 0.5**8
        0.007812
        >>> round(pattern_probability(Rule.steady_trend(6)), 6)  # 2 / 6!
        0.002778
    """
    if rule.id is RuleId.BEYOND_LIMITS:
        return 2.0 * _upper_tail(limit_sigma)
    if rule.id in (RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER):
        q = _upper_tail(rule.sigma)
        # the newest point is beyond, and at least count - 1 of the window's others on that side
        others = float(special.bdtrc(rule.count - 2, rule.length - 1, q))  # binomial P(X > count - 2)
        return 2.0 * q * others
    if rule.id is RuleId.SAME_SIDE_RUN:
        return 2.0 * 0.5**rule.length
    if rule.id is RuleId.STEADY_TREND:
        return 2.0 / math.factorial(rule.length)
    if rule.id is RuleId.ALTERNATING_RUN:
        return 2.0 * _zigzag(rule.length) / math.factorial(rule.length)
    inside = 1.0 - 2.0 * _upper_tail(rule.sigma)
    if rule.id is RuleId.HUGGING_CENTER:
        return inside**rule.length
    outside_one_side = _upper_tail(rule.sigma)
    return (2.0 * outside_one_side) ** rule.length - 2.0 * outside_one_side**rule.length


def range_tail(w: float, n: int) -> float:
    """P(R / sigma >= w) for the range of n normal readings (exact integral)."""
    return max(0.0, 1.0 - range_cdf(w, n))


def _rule_of(signal: Signal, rules: tuple[Rule, ...]) -> Rule | None:
    return next((r for r in rules if r.id is signal.rule), None)


def p_value(signal: Signal, *, n: int, rules: tuple[Rule, ...] = (), limit_sigma: float = 3.0) -> PValue:
    """The p-value of one signal under a normal in-control process.

    Args:
        signal: the signal.
        n: readings in its subgroup (the moving-range span for moving ranges).
        rules: the chart's rules, for the parameters of a run rule.
        limit_sigma: where the chart's limits are, in sigma.
    """
    statistic = signal.statistic
    upper = signal.side is Side.UPPER
    if signal.rule is not RuleId.BEYOND_LIMITS:
        rule = (
            _rule_of(signal, rules)
            or {
                RuleId.OUTER_ZONE_CLUSTER: Rule.outer_zone_cluster(),
                RuleId.MIDDLE_ZONE_CLUSTER: Rule.middle_zone_cluster(),
                RuleId.SAME_SIDE_RUN: Rule.same_side_run(),
                RuleId.STEADY_TREND: Rule.steady_trend(),
                RuleId.ALTERNATING_RUN: Rule.alternating_run(),
                RuleId.HUGGING_CENTER: Rule.hugging_center(),
                RuleId.AVOIDING_CENTER: Rule.avoiding_center(),
            }[signal.rule]
        )
        return PValue(pattern_probability(rule, limit_sigma), "closed form")
    if statistic in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER):
        return PValue(None, "not computed (needs the Markov chain of the sums)")
    if statistic in (
        Statistic.MEAN,
        Statistic.INDIVIDUAL,
        Statistic.EWMA,
        Statistic.PROPORTION,
        Statistic.RATE,
    ):
        if signal.z is None:
            return PValue(None, "not computed")
        tail = _upper_tail(signal.z) if upper else _upper_tail(-signal.z)
        method = (
            "normal approximation" if statistic in (Statistic.PROPORTION, Statistic.RATE) else "closed form"
        )
        return PValue(tail, method)
    if statistic is Statistic.SD:
        # (n - 1) S^2 / sigma^2 is chi-square with n - 1 degrees of freedom; sigma = center / c4
        sigma = signal.center / c4(n)
        x = (n - 1) * (signal.value / sigma) ** 2
        tail = float(special.chdtrc(n - 1, x)) if upper else float(special.chdtr(n - 1, x))
        return PValue(tail, "closed form")
    # range or moving range: sigma = center / d2(n)
    sigma = signal.center / d2(n)
    w = signal.value / sigma
    tail = range_tail(w, n) if upper else 1.0 - range_tail(w, n)
    return PValue(min(1.0, max(0.0, tail)), "numerical integration")
