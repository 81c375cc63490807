"""Average run lengths and chart design, against published tables and independent computations.

Sources named beside each check:

* Champ, C. W. and Woodall, W. H. (1987), "Exact results for Shewhart control charts with
  supplementary runs rules", *Technometrics* 29: the four Western Electric rules together,
  in-control ARL 91.75 (the published table); the rule pairs (225.44, 166.05,
  152.73) are from memory of the same paper's table.
* Montgomery and Runger, *Applied Statistics and Probability for Engineers*, table "Average Run
  Lengths for a CUSUM Control Chart with K = 1/2" (two-sided; also in Montgomery's *Introduction
  to Statistical Quality Control*, CUSUM chapter): h = 4 and h = 5 in control and at one sigma are
  the published values; the other shifts are from memory.
* Lucas, J. M. and Saccucci, M. S. (1990), *Technometrics* 32, as tabulated in Montgomery's EWMA
  chapter: lambda = 0.10, L = 2.814 gives 500 in control (the published table); the other rows are
  from memory.
* Lucas, J. M. and Crosier, R. B. (1982), "Fast initial response for CUSUM quality-control
  schemes", *Technometrics* 24: k = 0.5, h = 5 with a head start of h/2 gives 430 in control
  and 6.35 at one sigma (value from memory).

Printed values are compared at one unit of their last printed digit. Every remembered value is
also computed a second way (a seeded Monte Carlo of the project's own chart or rule objects, or
a second numerical method) before it is trusted. Monte Carlo checks accept a difference of four
standard errors plus the stated error of the computed value: with some sixty simulation checks
in this file, that keeps the chance of any false failure below 0.5 % (Bonferroni). The seeds are
fixed, so the tests are deterministic; no seed was chosen to make a check pass.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from monitor.spc import ConfigError, CusumChart, EwmaChart, RuleSet, SubgroupBatch
from monitor.spc.arl import (
    DEFAULT_SMOOTHINGS,
    RunLength,
    _cusum_joint,
    cusum_arl,
    cusum_decision_interval,
    cusum_tail,
    ewma_arl,
    ewma_tail,
    ewma_width,
    normal_cdf,
    recommend_cusum,
    recommend_ewma,
    shewhart_arl,
)
from monitor.spc.rules import Rule, nelson, western_electric

BEYOND = Rule.beyond_limits()


# ------------------------------------------------------------------ helpers


def close_to_printed(value, printed):
    """Within one unit of the last printed digit of a published value."""
    unit = 10.0 ** -(len(printed.split(".")[1])) if "." in printed else 1.0
    return abs(value - float(printed)) <= unit


def agrees(sample, value, error=0.0):
    """A Monte Carlo sample mean within four standard errors (plus a stated error) of value."""
    standard_error = sample.std(ddof=1) / math.sqrt(sample.shape[0])
    return abs(sample.mean() - value) <= 4.0 * standard_error + (error or 0.0)


def gamma_mean_cdf(n):
    """CDF of the standardized mean of n exponential readings (a gamma law: common practice)."""

    def cdf(z):
        return stats.gamma.cdf(1.0 + np.asarray(z) / math.sqrt(n), a=n, scale=1.0 / n)

    return cdf


def gamma_mean_points(n):
    """Draws of the standardized mean of n exponential readings."""

    def draw(rng, size):
        return (rng.gamma(n, 1.0 / n, size) - 1.0) * math.sqrt(n)

    return draw


def normal_points(shift=0.0):
    def draw(rng, size):
        return rng.standard_normal(size) + shift

    return draw


def rule_set_run_lengths(rules, runs, seed, draw=None, window=256):
    """Run lengths of the real RuleSet: a fresh rule set per run, restarted after its first hit."""
    draw = draw or normal_points()
    rng = np.random.default_rng(seed)
    lengths = []
    while len(lengths) < runs:
        rule_set = RuleSet(list(rules))
        seen = 0
        while True:
            hits = rule_set.scan(draw(rng, window), first_index=seen)
            if hits:
                lengths.append(hits[0].index + 1)
                break
            seen += window
    return np.asarray(lengths, dtype=np.float64)


def chart_run_lengths(make_chart, runs, seed, shift=0.0, window=1024):
    """Run lengths of a real chart object (one reading per subgroup), restarted after each signal."""
    rng = np.random.default_rng(seed)
    lengths = []
    while len(lengths) < runs:
        chart = make_chart()
        while True:
            result = chart.update_many(SubgroupBatch.from_rows(rng.standard_normal(window) + shift))
            if result.signals:
                lengths.append(result.signals[0].subgroup + 1)
                break
    return np.asarray(lengths, dtype=np.float64)


def asymptotic_ewma_run_lengths(smoothing, width, runs, seed, shift=0.0):
    """Run lengths of an EWMA with the asymptotic limits of the tables (plain numpy, all runs at once)."""
    rng = np.random.default_rng(seed)
    half = width * math.sqrt(smoothing / (2.0 - smoothing))
    value = np.zeros(runs)
    lengths = np.zeros(runs)
    alive = np.ones(runs, dtype=bool)
    t = 0
    while alive.any():
        t += 1
        value = (1.0 - smoothing) * value + smoothing * (rng.standard_normal(runs) + shift)
        fired = alive & (np.abs(value) > half)
        lengths[fired] = t
        alive &= ~fired
    return lengths


def two_sided_cusum_run_lengths(k, h, runs, seed, shift=0.0):
    """Run lengths of a two-sided tabular CUSUM (plain numpy, all runs at once, finished runs dropped)."""
    rng = np.random.default_rng(seed)
    upper = np.zeros(runs)
    lower = np.zeros(runs)
    alive = np.arange(runs)
    lengths = np.zeros(runs)
    t = 0
    while alive.shape[0]:
        t += 1
        z = rng.standard_normal(alive.shape[0]) + shift
        upper = np.maximum(0.0, upper + z - k)
        lower = np.maximum(0.0, lower - z - k)
        fired = (upper > h) | (lower > h)
        lengths[alive[fired]] = t
        alive, upper, lower = alive[~fired], upper[~fired], lower[~fired]
    return lengths


# ------------------------------------------------------------------ Shewhart chart, point rule


def test_the_three_sigma_point_rule_alone_has_an_in_control_arl_of_370_4():
    """One point beyond 3 sigma alone: ARL 1/0.0026998 = 370.4 (exact formula)."""
    result = shewhart_arl([BEYOND])
    assert result.method == "closed form"
    assert round(result.arl, 1) == 370.4
    assert result.arl == pytest.approx(1.0 / (2.0 * special.ndtr(-3.0)), rel=1e-12)


def test_the_point_rule_catches_a_one_sigma_shift_in_43_89_points_on_average():
    """With the mean shifted by 1 sigma: ARL 43.89 (exact formula)."""
    result = shewhart_arl([BEYOND], shift=1.0)
    assert round(result.arl, 2) == 43.89
    p = special.ndtr(-2.0) + special.ndtr(-4.0)
    assert result.sd == pytest.approx(math.sqrt(1.0 - p) / p, rel=1e-12)


def test_an_ewma_with_full_weight_is_the_shewhart_chart():
    """lambda = 1 makes the EWMA the point itself, so its chain gives the 370.4 of the point rule."""
    result = ewma_arl(1.0, 3.0)
    assert result.arl == pytest.approx(shewhart_arl([BEYOND]).arl, rel=1e-9)


# ------------------------------------------------------------------ zone rules


def test_the_four_western_electric_rules_together_have_an_in_control_arl_of_91_75():
    """Champ and Woodall (1987, Technometrics 29): the four rules together, ARL 91.75."""
    result = shewhart_arl(western_electric())
    assert result.method == "Markov chain"
    assert result.error is None
    assert round(result.arl, 2) == 91.75


@pytest.mark.parametrize(
    ("second_rule", "printed"),
    [
        (Rule.outer_zone_cluster(2, 3, 2.0), "225.44"),
        (Rule.middle_zone_cluster(4, 5, 1.0), "166.05"),
        (Rule.same_side_run(8), "152.73"),
    ],
)
def test_the_point_rule_with_one_zone_rule_matches_champ_and_woodall(second_rule, printed):
    """Champ and Woodall (1987): point rule plus one zone rule (value from memory; the simulation test below backs it)."""
    assert close_to_printed(shewhart_arl([BEYOND, second_rule]).arl, printed)


@pytest.mark.slow
@pytest.mark.parametrize(
    ("second_rule", "seed"),
    [
        (Rule.outer_zone_cluster(2, 3, 2.0), 11),
        (Rule.middle_zone_cluster(4, 5, 1.0), 12),
        (Rule.same_side_run(8), 13),
    ],
)
def test_rule_pairs_agree_with_a_simulation_of_the_rule_set(second_rule, seed):
    """The chain of each rule pair agrees with a seeded simulation of RuleSet (5000 runs)."""
    rules = [BEYOND, second_rule]
    sample = rule_set_run_lengths(rules, 5000, seed, window=512)
    assert agrees(sample, shewhart_arl(rules).arl)


@pytest.mark.slow
def test_the_western_electric_chain_agrees_with_a_simulation_of_the_rule_set():
    """RuleSet(western_electric()) restarted after each first signal: mean and sd match the chain."""
    sample = rule_set_run_lengths(western_electric(), 20_000, seed=1)
    result = shewhart_arl(western_electric())
    assert agrees(sample, result.arl)
    # the sd of a sample sd is about sd * sqrt((kurtosis - 1) / 4n); 5 % is over four of those
    assert sample.std(ddof=1) == pytest.approx(result.sd, rel=0.05)


@pytest.mark.slow
def test_the_western_electric_chain_agrees_with_a_simulation_after_a_one_sigma_shift():
    """Out of control (mean up 1 sigma) the chain and a RuleSet simulation agree."""
    sample = rule_set_run_lengths(western_electric(), 20_000, seed=2, draw=normal_points(1.0), window=64)
    assert agrees(sample, shewhart_arl(western_electric(), shift=1.0).arl)


@pytest.mark.parametrize("shift", [0.0, 0.7])
def test_a_run_on_one_side_alone_has_the_classical_waiting_time_of_a_success_run(shift):
    """Runs of 8 on either side: 1/E = 1/E+ + 1/E- with E+ = (1 - p^m)/(q p^m) (Feller, vol. 1, ch. XIII; from memory)."""
    m = 8
    p = float(special.ndtr(shift))  # P(z > 0) with the mean shifted up
    q = 1.0 - p
    up = (1 - p**m) / (q * p**m)
    down = (1 - q**m) / (p * q**m)
    expected = up * down / (up + down)
    assert shewhart_arl([Rule.same_side_run(m)], shift=shift).arl == pytest.approx(expected, rel=1e-10)
    if shift == 0.0:
        assert expected == pytest.approx(2**m - 1)  # 255 for a fair coin


def test_hugging_the_center_alone_waits_for_a_success_run():
    """15 in a row within 1 sigma: E = (1 - p^m)/(q p^m), p = P(|z| <= 1) (Feller, vol. 1, ch. XIII; from memory)."""
    p = 1.0 - 2.0 * float(special.ndtr(-1.0))
    m = 15
    expected = (1 - p**m) / ((1 - p) * p**m)
    assert shewhart_arl([Rule.hugging_center(15, 1.0)]).arl == pytest.approx(expected, rel=1e-10)


@pytest.mark.slow
def test_avoiding_the_center_alone_agrees_with_a_simulation_of_the_rule_set():
    """8 in a row beyond 1 sigma with both sides present: chain against RuleSet simulation."""
    rules = [Rule.avoiding_center(4, 1.0)]  # 4 keeps the ARL (about 60) cheap to simulate
    sample = rule_set_run_lengths(rules, 10_000, seed=3, window=512)
    assert agrees(sample, shewhart_arl(rules).arl)


# ------------------------------------------------------------------ order rules


def test_a_three_point_trend_alone_has_the_zigzag_closed_form():
    """No 3-point monotone run in n points means an alternating permutation, 2 E_n of them.

    André's theorem (sum of E_n x^n / n! = sec x + tan x; common practice, no source) gives
    ARL = 2 sec 1 + 2 tan 1 - 2.
    """
    result = shewhart_arl([Rule.steady_trend(3)])
    assert result.method == "rank recursion"
    assert result.arl == pytest.approx(2 / math.cos(1) + 2 * math.tan(1) - 2, rel=1e-12)


def test_a_three_point_alternation_alone_has_the_closed_form_2e_minus_2():
    """Only monotone sequences avoid a peak or valley: P(T > n) = 2/n!, so ARL = 2e - 2 (common practice, no source)."""
    assert shewhart_arl([Rule.alternating_run(3)]).arl == pytest.approx(2 * math.e - 2, rel=1e-12)


@pytest.mark.parametrize(
    ("rules", "seed"),
    [
        ([Rule.steady_trend(6)], 21),
        ([Rule.alternating_run(14)], 22),
        ([Rule.steady_trend(6), Rule.alternating_run(14)], 23),
    ],
)
@pytest.mark.slow
def test_trend_and_alternation_alone_agree_with_a_simulation_of_the_rule_set(rules, seed):
    """The rank recursion agrees with RuleSet on normal points (10 000 runs)."""
    sample = rule_set_run_lengths(rules, 10_000, seed, window=1024)
    assert agrees(sample, shewhart_arl(rules).arl)


@pytest.mark.slow
def test_a_trend_rule_is_blind_to_a_sustained_shift_and_to_skewness():
    """Order rules see ranks only: a shifted or skewed process gives the in-control law (simulated)."""
    rules = [Rule.steady_trend(6)]
    expected = shewhart_arl(rules).arl
    assert shewhart_arl(rules, shift=2.0, cdf=gamma_mean_cdf(4)).arl == expected
    shifted = rule_set_run_lengths(rules, 10_000, 24, draw=normal_points(2.0), window=1024)
    skewed = rule_set_run_lengths(rules, 10_000, 25, draw=gamma_mean_points(4), window=1024)
    assert agrees(shifted, expected)
    assert agrees(skewed, expected)


@pytest.mark.slow
def test_the_nelson_set_agrees_with_a_simulation_of_the_rule_set():
    """Nelson's eight tests: the internal simulation agrees with RuleSet(nelson()) (20 000 runs)."""
    result = shewhart_arl(nelson())
    assert result.method == "simulation"
    assert result.error is not None
    assert result.error < 0.01 * result.arl
    sample = rule_set_run_lengths(nelson(), 20_000, seed=4)
    assert agrees(sample, result.arl, result.error)


def test_a_mixed_set_is_simulated_reproducibly():
    """The simulation of a mixed set is a deterministic function of its seed."""
    rules = [BEYOND, Rule.steady_trend(6)]
    first = shewhart_arl(rules, simulation_runs=2000, seed=5)
    assert first == shewhart_arl(rules, simulation_runs=2000, seed=5)
    assert first != shewhart_arl(rules, simulation_runs=2000, seed=6)


# ------------------------------------------------------------------ non-normal plug-in


def test_a_skewed_mean_gets_the_exact_tail_arl_far_below_370():
    """Mean of 4 exponential readings: ARL = 1/P(|z| > 3), the gamma tail by the Poisson sum (common practice, no source)."""
    # xbar > 1 + 3/2 means a Gamma(4, 1) sum above 10: P = exp(-10) sum_{j<4} 10^j / j!
    upper = math.exp(-10.0) * sum(10.0**j / math.factorial(j) for j in range(4))
    lower = 0.0  # xbar < 1 - 3/2 is impossible
    result = shewhart_arl([BEYOND], cdf=gamma_mean_cdf(4))
    assert result.arl == pytest.approx(1.0 / (upper + lower), rel=1e-9)
    assert result.arl < 100.0


@pytest.mark.slow
def test_a_skewed_mean_under_the_western_electric_rules_agrees_with_a_simulation():
    """The zone chain with a gamma CDF agrees with RuleSet on simulated gamma means (the CDF path)."""
    cdf = gamma_mean_cdf(4)
    result = shewhart_arl(western_electric(), cdf=cdf)
    sample = rule_set_run_lengths(western_electric(), 20_000, seed=7, draw=gamma_mean_points(4))
    assert agrees(sample, result.arl)
    assert abs(result.arl - shewhart_arl(western_electric()).arl) > 5.0


def test_a_law_that_never_reaches_a_zone_gives_an_infinite_arl():
    """Points confined to [-1, 1] never go beyond 2 or 3 sigma: those rules never fire."""
    confined = lambda z: np.clip((np.asarray(z) + 1.0) / 2.0, 0.0, 1.0)  # noqa: E731
    assert math.isinf(shewhart_arl([BEYOND], cdf=confined).arl)
    assert math.isinf(shewhart_arl([BEYOND, Rule.outer_zone_cluster()], cdf=confined).arl)
    assert math.isfinite(shewhart_arl([BEYOND, Rule.same_side_run(8)], cdf=confined).arl)


# ------------------------------------------------------------------ CUSUM


CUSUM_TABLE = [
    # (h, shift, printed ARL): Montgomery and Runger, two-sided CUSUM with K = 1/2
    (4.0, 0.0, "168"),  # the published table
    (4.0, 1.0, "8.38"),  # the published table
    (5.0, 0.0, "465"),  # the published table
    (5.0, 1.0, "10.4"),  # the published table
    (4.0, 0.25, "74.2"),  # value from memory
    (4.0, 0.5, "26.6"),  # value from memory
    (4.0, 0.75, "13.3"),  # value from memory
    (4.0, 1.5, "4.75"),  # value from memory
    (4.0, 2.0, "3.34"),  # value from memory
    (4.0, 3.0, "2.19"),  # value from memory
    (5.0, 0.25, "139"),  # value from memory
    (5.0, 0.5, "38.0"),  # value from memory
    (5.0, 0.75, "17.0"),  # value from memory
    (5.0, 1.5, "5.75"),  # value from memory
    (5.0, 2.0, "4.01"),  # value from memory
    (5.0, 3.0, "2.57"),  # value from memory
]


@pytest.mark.parametrize(("h", "shift", "printed"), CUSUM_TABLE)
def test_two_sided_cusum_matches_the_k_one_half_table(h, shift, printed):
    """Montgomery and Runger, ARL table for a two-sided CUSUM with K = 1/2 (Hawkins 1993)."""
    assert close_to_printed(cusum_arl(0.5, h, shift=shift).arl, printed)


@pytest.mark.slow
@pytest.mark.parametrize(("h", "shift", "printed"), CUSUM_TABLE)
def test_every_cusum_table_entry_agrees_with_a_plain_simulation(h, shift, printed):
    """Each table entry's chain value agrees with a plain numpy simulation of both sums (20 000 runs)."""
    result = cusum_arl(0.5, h, shift=shift)
    seed = int(h * 1000 + shift * 100)
    sample = two_sided_cusum_run_lengths(0.5, h, 20_000, seed, shift)
    assert agrees(sample, result.arl, result.error)


@pytest.mark.slow
@pytest.mark.parametrize(
    ("h", "shift", "head_start", "runs", "seed"),
    [
        (4.0, 0.0, 0.0, 5000, 31),
        (5.0, 1.0, 0.0, 5000, 32),
        (5.0, 0.5, 0.0, 5000, 33),
        (5.0, 1.0, 2.5, 5000, 34),
        (5.0, 0.0, 4.0, 5000, 35),
    ],
)
def test_cusum_chain_agrees_with_a_simulation_of_the_chart(h, shift, head_start, runs, seed):
    """The chain agrees with CusumChart itself (restarted after each signal), with and without head start."""
    result = cusum_arl(0.5, h, shift=shift, head_start=head_start)

    def make():
        return CusumChart(mean=0.0, sigma=1.0, k=0.5, h=h, head_start=head_start)

    sample = chart_run_lengths(make, runs, seed, shift=shift, window=64 if shift else 1024)
    assert agrees(sample, result.arl, result.error)


def test_the_one_sided_cusum_is_about_twice_the_two_sided_in_control():
    """By symmetry both sides have the same in-control ARL, so the two-sided one is half of it."""
    one = cusum_arl(0.5, 5.0, two_sided=False)
    two = cusum_arl(0.5, 5.0)
    assert two.arl == pytest.approx(one.arl / 2.0, rel=1e-12)
    assert one.sd is not None
    assert two.sd is None


@pytest.mark.parametrize(("head_start", "shift"), [(0.0, 0.0), (0.0, 1.0), (2.5, 0.0), (2.5, 1.0)])
def test_the_two_side_relation_agrees_with_a_joint_chain_of_both_sums(head_start, shift):
    """A second method: the two-dimensional chain of (C+, C-) gives the same ARL as the one-sided chains combined."""
    law = lambda z: normal_cdf(z - shift)  # noqa: E731
    joint = [_cusum_joint(0.5, 5.0, head_start, n, law) for n in (24, 48)]
    extrapolated = joint[1] + (joint[1] - joint[0]) / 3.0
    combined = cusum_arl(0.5, 5.0, head_start=head_start, shift=shift).arl
    assert extrapolated == pytest.approx(combined, rel=2e-4)


@pytest.mark.parametrize(("shift", "printed"), [(0.0, "430"), (1.0, "6.35")])
def test_a_half_h_head_start_matches_lucas_and_crosier(shift, printed):
    """Lucas and Crosier (1982): k = 0.5, h = 5, head start 2.5 (value from memory; joint chain and simulation back it)."""
    assert close_to_printed(cusum_arl(0.5, 5.0, head_start=2.5, shift=shift).arl, printed)


def test_a_large_head_start_uses_the_joint_chain():
    """Above h/2 the two-side relation is no longer exact; the joint chain answers (its size is squared)."""
    result = cusum_arl(0.5, 5.0, head_start=4.0)
    assert result.states is not None
    assert result.states >= 24 * 24
    assert result.error is not None


def test_cusum_chain_error_estimate_covers_a_much_finer_chain():
    """The stated error of the refined chain covers the difference to a fixed chain of 1600 states."""
    refined = cusum_arl(0.5, 5.0, two_sided=False)
    fine = cusum_arl(0.5, 5.0, two_sided=False, states=1600)
    assert refined.error is not None
    assert abs(refined.arl - fine.arl) <= refined.error + fine.error
    assert refined.error < 1e-4 * refined.arl


# ------------------------------------------------------------------ EWMA


EWMA_TABLE = [
    # (lambda, L, shift, printed ARL): Lucas and Saccucci (1990) as tabulated by Montgomery
    (0.10, 2.814, 0.0, "500"),  # the published table
    (0.10, 2.814, 0.5, "31.3"),  # value from memory
    (0.10, 2.814, 1.0, "10.3"),  # value from memory
    (0.10, 2.814, 2.0, "4.4"),  # value from memory
    (0.05, 2.615, 0.0, "500"),  # value from memory
    (0.05, 2.615, 1.0, "11.4"),  # value from memory
    (0.20, 2.962, 0.0, "500"),  # value from memory
    (0.20, 2.962, 0.5, "41.8"),  # value from memory
    (0.20, 2.962, 1.0, "10.5"),  # value from memory
    (0.25, 2.998, 0.0, "500"),  # value from memory
    (0.25, 2.998, 1.0, "11.1"),  # value from memory
    (0.40, 3.054, 0.0, "500"),  # value from memory
    (0.40, 3.054, 0.25, "224"),  # value from memory
    (0.40, 3.054, 1.0, "14.3"),  # value from memory
]


@pytest.mark.parametrize(("smoothing", "width", "shift", "printed"), EWMA_TABLE)
def test_ewma_matches_the_lucas_saccucci_table(smoothing, width, shift, printed):
    """Lucas and Saccucci (1990), as tabulated by Montgomery: asymptotic limits, start at target."""
    assert close_to_printed(ewma_arl(smoothing, width, shift=shift).arl, printed)


@pytest.mark.slow
@pytest.mark.parametrize(("smoothing", "width", "shift", "printed"), EWMA_TABLE)
def test_every_ewma_table_entry_agrees_with_a_simulation_with_asymptotic_limits(
    smoothing, width, shift, printed
):
    """The table setting (asymptotic limits) simulated in plain numpy agrees with the chain (20 000 runs)."""
    result = ewma_arl(smoothing, width, shift=shift)
    seed = int(smoothing * 1000 + shift * 100)
    sample = asymptotic_ewma_run_lengths(smoothing, width, 20_000, seed, shift)
    assert agrees(sample, result.arl, result.error)


@pytest.mark.slow
def test_the_real_ewma_chart_has_the_arl_of_its_exact_limits():
    """EwmaChart uses exact time-varying limits: its simulated ARL matches that chain, below the table's 500."""
    exact = ewma_arl(0.1, 2.814, time_varying_limits=True)
    asymptotic = ewma_arl(0.1, 2.814)
    sample = chart_run_lengths(lambda: EwmaChart(mean=0.0, sigma=1.0, smoothing=0.1, width=2.814), 20_000, 48)
    assert agrees(sample, exact.arl, exact.error)
    # the narrower early limits cost about 13 points of in-control ARL here (486 against 500)
    assert 8.0 < asymptotic.arl - exact.arl < 20.0


@pytest.mark.slow
def test_the_fast_initial_response_of_the_chart_matches_its_chain():
    """EwmaChart with fast initial response at a 1-sigma shift agrees with the chain; it is quicker than without."""
    chained = ewma_arl(0.1, 2.814, shift=1.0, fast_initial_response=True, time_varying_limits=True)
    plain = ewma_arl(0.1, 2.814, shift=1.0, time_varying_limits=True)

    def make():
        return EwmaChart(mean=0.0, sigma=1.0, smoothing=0.1, width=2.814, fast_initial_response=True)

    sample = chart_run_lengths(make, 20_000, 49, shift=1.0, window=64)
    assert agrees(sample, chained.arl, chained.error)
    assert chained.arl < plain.arl - 1.0


def test_ewma_chain_error_estimate_covers_a_much_finer_chain():
    """The stated error of the refined chain covers the difference to a fixed chain of 3200 cells."""
    refined = ewma_arl(0.05, 2.615)
    fine = ewma_arl(0.05, 2.615, states=3200)
    assert refined.error is not None
    assert abs(refined.arl - fine.arl) <= refined.error + fine.error
    assert refined.error < 1e-4 * refined.arl


# ------------------------------------------------------------------ design


def test_ewma_width_recovers_the_tabulated_l():
    """L for lambda = 0.1 and ARL0 = 500 is 2.814 (Lucas and Saccucci 1990)."""
    assert ewma_width(0.1, 500.0) == pytest.approx(2.814, abs=0.0005)


def test_cusum_decision_interval_recovers_h_five():
    """h for k = 0.5 and two-sided ARL0 465 is 5 (Montgomery and Runger table)."""
    assert cusum_decision_interval(0.5, 465.0) == pytest.approx(5.0, abs=0.005)


def test_recommended_ewma_meets_the_in_control_arl_and_beats_its_grid_neighbours():
    """recommend_ewma(500, 1): ARL0 500 and an ARL1 no worse than the neighbouring weights'."""
    design = recommend_ewma(500.0, 1.0)
    lam, width = design.params["smoothing"], design.params["width"]
    assert design.chart == "ewma"
    assert design.arl0 == pytest.approx(500.0, rel=1e-4)
    assert ewma_arl(lam, width).arl == pytest.approx(500.0, rel=1e-4)
    assert design.arl1 == pytest.approx(ewma_arl(lam, width, shift=1.0).arl)
    position = DEFAULT_SMOOTHINGS.index(lam)
    for neighbour in DEFAULT_SMOOTHINGS[max(position - 1, 0) : position + 2]:
        other = ewma_width(neighbour, 500.0)
        assert design.arl1 <= ewma_arl(neighbour, other, shift=1.0).arl
    # small weights suit small shifts (Lucas and Saccucci 1990; common practice)
    assert 0.05 <= lam <= 0.2


def test_recommended_cusum_uses_half_the_shift_and_h_five():
    """recommend_cusum(465, 1): k = 0.5 (Page's reference value, common practice) and h about 5."""
    design = recommend_cusum(465.0, 1.0)
    assert design.chart == "cusum"
    assert design.params["k"] == 0.5
    assert design.params["h"] == pytest.approx(5.0, abs=0.005)
    assert design.arl0 == pytest.approx(465.0, rel=1e-4)
    assert design.arl1 == pytest.approx(10.4, abs=0.05)


# ------------------------------------------------------------------ laws of the plotted sums


def test_cusum_tail_after_one_subgroup_is_the_normal_tail():
    """After one subgroup C = max(0, s + z - k): P(C >= c) = P(z >= c + k - s) (closed form)."""
    assert cusum_tail(0.5, 5.0, 3.0, subgroups_since_start=1) == pytest.approx(special.ndtr(-3.5), rel=1e-9)
    got = cusum_tail(0.5, 5.0, 3.0, subgroups_since_start=1, head_start=2.5)
    assert got == pytest.approx(special.ndtr(-1.0), rel=1e-9)


@pytest.mark.slow
def test_cusum_tail_agrees_with_a_simulation_of_the_sums():
    """P(C_t >= c) at t = 10 and t = 300 (stationary) match a plain numpy simulation of the sums."""
    rng = np.random.default_rng(51)
    runs = 400_000
    upper = np.zeros(runs)
    for t in range(1, 301):
        upper = np.maximum(0.0, upper + rng.standard_normal(runs) - 0.5)
        if t in (10, 300):
            for c in (2.0, 5.0):
                p = float((upper >= c).mean())
                half = 4.0 * math.sqrt(p * (1 - p) / runs)
                steps = None if t == 300 else t
                assert abs(cusum_tail(0.5, 5.0, c, subgroups_since_start=steps) - p) <= half


def test_cusum_tail_settles_to_its_stationary_law():
    """Propagating the sum 3000 steps and solving for the stationary vector agree (two methods)."""
    late = cusum_tail(0.5, 5.0, 5.0, subgroups_since_start=3000)
    stationary = cusum_tail(0.5, 5.0, 5.0)
    assert late == pytest.approx(stationary, rel=1e-6)
    # Siegmund's corrected diffusion, exp(-2k(c + 0.583)), as a rough guide (from memory)
    assert stationary == pytest.approx(math.exp(-(5.0 + 0.583)), rel=0.03)


@pytest.mark.slow
def test_the_lower_cusum_tail_of_a_skewed_mean_agrees_with_a_simulation():
    """The lower sum of gamma means (short lower tail) matches a simulation; the upper tail is heavier."""
    n = 4
    cdf = gamma_mean_cdf(n)
    draw = gamma_mean_points(n)
    rng = np.random.default_rng(52)
    runs = 400_000
    lower = np.zeros(runs)
    upper = np.zeros(runs)
    for _ in range(50):
        z = draw(rng, runs)
        lower = np.maximum(0.0, lower - z - 0.5)
        upper = np.maximum(0.0, upper + z - 0.5)
    for sums, side in ((lower, "lower"), (upper, "upper")):
        p = float((sums >= 3.0).mean())
        half = 4.0 * math.sqrt(p * (1 - p) / runs)
        assert abs(cusum_tail(0.5, 5.0, 3.0, cdf=cdf, side=side, subgroups_since_start=50) - p) <= half
    assert cusum_tail(0.5, 5.0, 3.0, cdf=cdf, side="upper") > 2 * cusum_tail(
        0.5, 5.0, 3.0, cdf=cdf, side="lower"
    )


@pytest.mark.parametrize(("smoothing", "value", "steps"), [(0.2, 1.0, None), (0.2, 0.9, 3), (0.1, -0.7, 40)])
def test_ewma_tail_grid_agrees_with_the_normal_closed_form(smoothing, value, steps):
    """The grid method (given the normal CDF as an opaque function) reproduces the closed form."""
    opaque = special.ndtr  # not normal_cdf itself, so the grid method is used
    for side in ("upper", "lower"):
        exact = ewma_tail(smoothing, value, subgroups_since_start=steps, side=side)
        grid = ewma_tail(smoothing, value, cdf=opaque, subgroups_since_start=steps, side=side)
        assert grid == pytest.approx(exact, rel=1e-4)


@pytest.mark.slow
def test_ewma_tail_of_a_skewed_mean_agrees_with_a_simulation():
    """EWMA of gamma means after 30 points: the grid tail matches a simulation."""
    n = 4
    rng = np.random.default_rng(53)
    runs = 400_000
    value = np.zeros(runs)
    for _ in range(30):
        value = 0.8 * value + 0.2 * gamma_mean_points(n)(rng, runs)
    for c in (0.6, 0.9):
        p = float((value >= c).mean())
        half = 4.0 * math.sqrt(p * (1 - p) / runs)
        assert abs(ewma_tail(0.2, c, cdf=gamma_mean_cdf(n), subgroups_since_start=30) - p) <= half


# ------------------------------------------------------------------ bad parameters


@pytest.mark.parametrize("smoothing", [0.0, -0.1, 1.5, math.nan, math.inf])
def test_a_smoothing_outside_zero_to_one_is_refused(smoothing):
    """lambda must be in (0, 1]: ConfigError naming lambda and the interval."""
    with pytest.raises(ConfigError, match=r"smoothing \(lambda\)"):
        ewma_arl(smoothing, 3.0)
    with pytest.raises(ConfigError, match=r"smoothing \(lambda\)"):
        ewma_width(smoothing, 500.0)


@pytest.mark.parametrize("h", [0.0, -1.0, math.nan])
def test_a_decision_interval_of_zero_or_less_is_refused(h):
    """h must be greater than 0."""
    with pytest.raises(ConfigError, match="h must"):
        cusum_arl(0.5, h)


def test_a_negative_reference_value_is_refused():
    """k must be zero or more, for the ARL, the design and the tail."""
    with pytest.raises(ConfigError, match="k must be zero or more"):
        cusum_arl(-0.5, 5.0)
    with pytest.raises(ConfigError, match="k must be zero or more"):
        cusum_decision_interval(-0.5, 370.0)
    with pytest.raises(ConfigError, match="k must be zero or more"):
        cusum_tail(-0.5, 5.0, 1.0)


@pytest.mark.parametrize("arl0", [1.0, 0.5, -3.0, math.inf])
def test_an_in_control_arl_of_one_or_less_is_refused(arl0):
    """arl0 must be greater than 1."""
    for call in (
        lambda: cusum_decision_interval(0.5, arl0),
        lambda: ewma_width(0.1, arl0),
        lambda: recommend_ewma(arl0, 1.0),
        lambda: recommend_cusum(arl0, 1.0),
    ):
        with pytest.raises(ConfigError, match=r"arl0 must be (greater than 1|a finite number)"):
            call()


def test_other_bad_parameters_are_refused_with_their_names():
    """Each bad parameter gets a ConfigError that names it."""
    cases = [
        (lambda: cusum_arl(0.5, 5.0, head_start=5.0), "head_start"),
        (lambda: cusum_arl(0.5, 5.0, states=2), "states"),
        (lambda: ewma_arl(0.1, 0.0), r"width \(L\)"),
        (lambda: ewma_arl(0.1, 3.0, shift=math.nan), "shift"),
        (lambda: shewhart_arl([]), "rules"),
        (lambda: shewhart_arl([BEYOND, BEYOND]), "listed twice"),
        (lambda: shewhart_arl([BEYOND], limit_sigma=0.0), "limit_sigma"),
        (lambda: shewhart_arl([BEYOND], cdf=lambda z: -np.ones_like(z)), "cdf"),
        (lambda: shewhart_arl([BEYOND], cdf=lambda z: 1.0 - special.ndtr(z)), "cdf must be non-decreasing"),
        (lambda: shewhart_arl(nelson(), simulation_runs=10), "simulation_runs"),
        (lambda: recommend_ewma(500.0, 0.0), "shift"),
        (lambda: recommend_ewma(500.0, 1.0, smoothings=(0.1, 2.0)), r"smoothing \(lambda\)"),
        (lambda: cusum_decision_interval(0.5, 1.2), "arl0"),
        (lambda: cusum_tail(0.0, 5.0, 1.0), "k must be greater than 0"),
        (lambda: cusum_tail(0.5, 5.0, 1.0, subgroups_since_start=0), "subgroups_since_start"),
        (lambda: ewma_tail(0.2, 1.0, side="middle"), "side"),
    ]
    for call, name in cases:
        with pytest.raises(ConfigError, match=name):
            call()


def test_run_length_is_a_frozen_value():
    """RunLength is immutable and compares by value."""
    result = shewhart_arl([BEYOND])
    assert result == RunLength(result.arl, result.sd, "closed form", None, None)
    with pytest.raises(AttributeError):
        result.arl = 1.0  # type: ignore[misc]
