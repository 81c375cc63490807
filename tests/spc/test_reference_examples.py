"""Published worked examples recomputed through the chart objects.

Every example runs twice, point by point (``update``) and as one batch (``update_many``); the
two paths must agree. Printed values are compared at half a unit (or one unit, where the book
rounds intermediate results) in their last printed digit.

The data and printed values were typed in from the sources as remembered, not read from the
documents while writing (value from memory), so each printed value stands beside an
independent recomputation in plain Python (the recursion or formula written out here). For the
piston-ring data the rows were cross-checked against a reprint of the table and against the
printed totals (see ``tests/spc/data.py``).

Sources:

* NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.4 (EWMA control charts) and
  section 6.3.2.3 (CUSUM control charts, tabular form);
* Montgomery, *Introduction to Statistical Quality Control*: the tabular CUSUM and the EWMA
  on the data of his Table 9.1, the p chart for orange-juice cans, the u chart for
  nonconformities in personal computers, the piston-ring data of Table 6.3 (Examples 6.1
  and 6.3), and the factors of Appendix VI.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from monitor.spc import (
    AttributeKind,
    CusumChart,
    EwmaChart,
    PChart,
    RuleId,
    Side,
    SigmaEstimator,
    Statistic,
    Subgroup,
    SubgroupBatch,
    UChart,
    XbarRChart,
    XbarSChart,
    constants,
    phase_one,
    phase_one_attribute,
)
from tests.spc.data import PISTON_RING_DIAMETERS

HALF_UNIT_2DP = 0.005 + 1e-9


def streamed(chart, subgroups):
    """Feed subgroups one at a time; return the points per statistic and all signals."""
    points: dict[Statistic, list] = {}
    signals = []
    for subgroup in subgroups:
        signals += chart.update(subgroup)
        for point in chart.last_points:
            points.setdefault(point.statistic, []).append(point)
    return points, signals


def assert_batch_agrees(chart, batch, points, signals):
    """update_many on a fresh chart gives the same points and signals as update in a loop."""
    result = chart.update_many(batch)
    assert result.signals == signals
    for statistic, trace in result.traces.items():
        assert list(trace.points()) == points[statistic], statistic


def single_readings(values):
    """One-reading subgroups, and the same as a batch."""
    return [Subgroup((float(v),)) for v in values], SubgroupBatch.from_rows(values)


# ---------------------------------------------------------------- NIST EWMA (6.3.2.4)

NIST_EWMA_DATA = [
    52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
    49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1,
]  # fmt: skip
NIST_EWMA_PRINTED = [
    50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33,
    50.11, 49.36, 49.52, 50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99,
]  # fmt: skip
NIST_LAMBDA, NIST_TARGET, NIST_S, NIST_L = 0.3, 50.0, 2.0539, 3.0


def _nist_ewma():
    return EwmaChart(mean=NIST_TARGET, sigma=NIST_S, smoothing=NIST_LAMBDA, width=NIST_L)


@pytest.fixture(scope="module")
def nist_ewma():
    subgroups, batch = single_readings(NIST_EWMA_DATA)
    points, signals = streamed(_nist_ewma(), subgroups)
    return points[Statistic.EWMA], signals, batch


def test_nist_ewma_values_match_the_printed_column(nist_ewma):
    """The 20 EWMA values match NIST 6.3.2.4 to half a unit in the second decimal."""
    points, _, _ = nist_ewma
    assert len(points) == 20
    for point, printed in zip(points, NIST_EWMA_PRINTED, strict=True):
        assert abs(point.value - printed) <= HALF_UNIT_2DP, (point.subgroup, point.value)


def test_nist_ewma_limits_reach_the_printed_asymptotic_limits(nist_ewma):
    """At t = 20 the exact limits equal the printed 47.4115 / 52.5884 within 1e-4."""
    # NIST prints UCL 52.5884, LCL 47.4115 with sqrt(lambda/(2-lambda)) rounded to 0.4201;
    # the exact limits differ from the asymptotic ones by the factor sqrt(1-(1-lambda)^(2t)).
    points, _, _ = nist_ewma
    last = points[-1]
    asymptotic_half = NIST_L * NIST_S * math.sqrt(NIST_LAMBDA / (2 - NIST_LAMBDA))
    convergence = asymptotic_half * (1 - math.sqrt(1 - (1 - NIST_LAMBDA) ** (2 * 20)))
    assert abs(last.upper - 52.5884) <= 1e-4 + convergence
    assert abs(last.lower - 47.4115) <= 1e-4 + convergence


def test_nist_ewma_limits_follow_the_exact_time_varying_formula(nist_ewma):
    """Limits at t are target -/+ L s sqrt(lambda/(2-lambda) (1-(1-lambda)^(2t)))."""
    # Lucas and Saccucci (1990); Montgomery, EWMA section (exact limits for early samples).
    points, _, _ = nist_ewma
    for t, point in enumerate(points, start=1):
        factor = NIST_LAMBDA / (2 - NIST_LAMBDA) * (1 - (1 - NIST_LAMBDA) ** (2 * t))
        half = NIST_L * NIST_S * math.sqrt(factor)
        assert point.upper == pytest.approx(NIST_TARGET + half, rel=1e-13)
        assert point.lower == pytest.approx(NIST_TARGET - half, rel=1e-13)
        assert point.center == NIST_TARGET


def test_nist_ewma_has_no_point_out_of_control(nist_ewma):
    """NIST 6.3.2.4 finds every EWMA value inside the limits: no signal."""
    _, signals, _ = nist_ewma
    assert signals == []


def test_nist_ewma_batch_path_agrees_with_streaming(nist_ewma):
    """update_many over the 20 readings gives the streaming points and signals."""
    points, signals, batch = nist_ewma
    assert_batch_agrees(_nist_ewma(), batch, {Statistic.EWMA: points}, signals)


# ---------------------------------------------------------------- NIST CUSUM (6.3.2.3)

NIST_CUSUM_DATA = [
    324.925, 324.675, 324.725, 324.350, 325.350, 325.225, 324.125, 324.525, 325.225, 324.600,
    324.625, 325.150, 328.325, 327.250, 327.825, 328.500, 326.675, 327.775, 326.875, 328.350,
]  # fmt: skip
NIST_S_HI = [
    0, 0, 0, 0, 0.03, 0, 0, 0, 0, 0, 0, 0, 3.01, 4.94, 7.45, 10.63, 11.99, 14.44, 16.00, 19.04,
]  # fmt: skip
NIST_S_LO = [
    0, 0.01, 0, 0.33, 0, 0, 0.56, 0.72, 0.17, 0.25, 0.31, 0, 0, 0, 0, 0, 0, 0, 0, 0,
]  # fmt: skip
# k = 0.3175 and h = 4.1959 in data units; sigma of the plotted means 0.635, so in sigma
# units k = 0.5 and h = 4.1959 / 0.635.
NIST_MU, NIST_SIGMA, NIST_K_DATA, NIST_H_DATA = 325.0, 0.635, 0.3175, 4.1959


def _nist_cusum():
    return CusumChart(mean=NIST_MU, sigma=NIST_SIGMA, k=NIST_K_DATA / NIST_SIGMA, h=NIST_H_DATA / NIST_SIGMA)


@pytest.fixture(scope="module")
def nist_cusum():
    subgroups, batch = single_readings(NIST_CUSUM_DATA)
    points, signals = streamed(_nist_cusum(), subgroups)
    return points, signals, batch


def test_nist_cusum_reference_value_is_half_a_sigma():
    """The printed k = 0.3175 is half the sigma 0.635 of the plotted values."""
    k_in_sigma_units = NIST_K_DATA / NIST_SIGMA
    assert k_in_sigma_units == pytest.approx(0.5, rel=1e-12)


def test_nist_cusum_sums_match_the_printed_columns(nist_cusum):
    """S_hi and S_lo (chart value times sigma) match NIST 6.3.2.3 to half a unit in 2 dp."""
    points, _, _ = nist_cusum
    upper = [p.value * NIST_SIGMA for p in points[Statistic.CUSUM_UPPER]]
    lower = [p.value * NIST_SIGMA for p in points[Statistic.CUSUM_LOWER]]
    for i, (hi, lo) in enumerate(zip(NIST_S_HI, NIST_S_LO, strict=True)):
        assert abs(upper[i] - hi) <= HALF_UNIT_2DP + 1e-6, (i + 1, upper[i])
        assert abs(lower[i] - lo) <= HALF_UNIT_2DP + 1e-6, (i + 1, lower[i])


def test_nist_cusum_sums_equal_an_independent_recursion_in_data_units(nist_cusum):
    """S_hi = max(0, S_hi + x - mu - k), S_lo = max(0, S_lo + mu - k - x), computed here."""
    points, _, _ = nist_cusum
    hi = lo = 0.0
    for x, up, down in zip(
        NIST_CUSUM_DATA, points[Statistic.CUSUM_UPPER], points[Statistic.CUSUM_LOWER], strict=True
    ):
        hi = max(0.0, hi + x - NIST_MU - NIST_K_DATA)
        lo = max(0.0, lo + NIST_MU - NIST_K_DATA - x)
        assert up.value * NIST_SIGMA == pytest.approx(hi, abs=1e-9)
        assert down.value * NIST_SIGMA == pytest.approx(lo, abs=1e-9)


def test_nist_cusum_first_signals_upper_at_observation_14(nist_cusum):
    """The upper sum first exceeds h at observation 14 and stays above; the lower never does."""
    _, signals, _ = nist_cusum
    assert {s.side for s in signals} == {Side.UPPER}
    assert [s.subgroup + 1 for s in signals] == list(range(14, 21))
    assert all(s.rule is RuleId.BEYOND_LIMITS for s in signals)


def test_nist_cusum_batch_path_agrees_with_streaming(nist_cusum):
    """update_many over the 20 readings gives the streaming points and signals."""
    points, signals, batch = nist_cusum
    assert_batch_agrees(_nist_cusum(), batch, points, signals)


# ---------------------------------------------------------------- Montgomery Table 9.1

# Montgomery, Introduction to Statistical Quality Control, Table 9.1: mu0 = 10, sigma = 1,
# the first 20 readings in control, the last 10 after a shift of one sigma.
TABLE_9_1 = [
    9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
    9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
    10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52,
]  # fmt: skip


def _montgomery_cusum():
    return CusumChart(mean=10.0, sigma=1.0, k=0.5, h=5.0)


@pytest.fixture(scope="module")
def montgomery_cusum():
    subgroups, batch = single_readings(TABLE_9_1)
    chart = _montgomery_cusum()
    points, signals = streamed(chart, subgroups)
    return chart, points, signals, batch


def test_montgomery_cusum_first_exceeds_h_at_sample_29_with_c_plus_5_28(montgomery_cusum):
    """The upper CUSUM first exceeds H = 5 at sample 29, where C+ = 5.28 (Montgomery)."""
    _, points, signals, _ = montgomery_cusum
    first = signals[0]
    assert first.side is Side.UPPER
    assert first.subgroup + 1 == 29
    assert abs(first.value - 5.28) <= HALF_UNIT_2DP
    assert points[Statistic.CUSUM_UPPER][27].value <= 5.0
    assert all(s.side is Side.UPPER for s in signals)


def test_montgomery_cusum_counts_seven_nonzero_sums_from_sample_23(montgomery_cusum):
    """The signal at sample 29 spans samples 23-29: seven consecutive non-zero C+ values."""
    _, points, signals, _ = montgomery_cusum
    assert [i + 1 for i in signals[0].subgroups] == list(range(23, 30))
    upper = [p.value for p in points[Statistic.CUSUM_UPPER]]
    assert upper[21] == 0.0
    assert all(v > 0 for v in upper[22:29])


def test_montgomery_cusum_shift_estimate_is_11_25(montgomery_cusum):
    """mu0 + K + C+/N+ = 10 + 0.5 + 5.28/7 = 11.25 at the first signal (Montgomery)."""
    chart, _, signals, _ = montgomery_cusum
    assert abs(chart.shift_estimate(signals[0]) - 11.25) <= HALF_UNIT_2DP
    # the same from the plain formula with the chart's own C+ and N+
    assert chart.shift_estimate(signals[0]) == pytest.approx(10.0 + 0.5 + signals[0].value / 7, rel=1e-14)


def test_montgomery_cusum_equals_an_independent_recursion(montgomery_cusum):
    """C+ and C- equal max(0, C + (x - 10) - 0.5) and max(0, C - (x - 10) - 0.5) computed here."""
    _, points, _, _ = montgomery_cusum
    up = down = 0.0
    for i, x in enumerate(TABLE_9_1):
        up = max(0.0, up + (x - 10.0) - 0.5)
        down = max(0.0, down - (x - 10.0) - 0.5)
        assert points[Statistic.CUSUM_UPPER][i].value == pytest.approx(up, abs=1e-12)
        assert points[Statistic.CUSUM_LOWER][i].value == pytest.approx(down, abs=1e-12)


def test_montgomery_cusum_batch_path_agrees_with_streaming(montgomery_cusum):
    """update_many over Table 9.1 gives the streaming points and signals."""
    _, points, signals, batch = montgomery_cusum
    assert_batch_agrees(_montgomery_cusum(), batch, points, signals)


def _montgomery_ewma():
    return EwmaChart(mean=10.0, sigma=1.0, smoothing=0.1, width=2.7)


def _independent_ewma(values, lam, target, sigma, width):
    """Plain-Python EWMA recursion with exact limits: the independent check."""
    z, out = target, []
    for t, x in enumerate(values, start=1):
        z = lam * x + (1 - lam) * z
        half = width * sigma * math.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)))
        out.append((z, target - half, target + half))
    return out


def test_montgomery_ewma_first_two_values_are_9_945_and_9_7495():
    """z1 = 0.1*9.45 + 0.9*10 = 9.945 and z2 = 0.1*7.99 + 0.9*9.945 = 9.7495 (by hand)."""
    chart = _montgomery_ewma()
    chart.update(Subgroup((9.45,)))
    assert chart.last_points[0].value == pytest.approx(9.945, abs=1e-12)
    chart.update(Subgroup((7.99,)))
    assert chart.last_points[0].value == pytest.approx(9.7495, abs=1e-12)


def test_montgomery_ewma_first_goes_beyond_the_ucl_at_sample_29():
    """The EWMA (lambda 0.1, L 2.7) first exceeds its UCL at sample 29, as recomputed here."""
    # The value from memory was sample 28. Two independent computations disagree with it:
    # the plain recursion below, and hand arithmetic: z28 = 10.5731 < UCL28 = 10.6186 while
    # z29 = 10.6468 > UCL29 = 10.6187 (even the asymptotic UCL 10.6194 gives 29). The
    # independent recursion is the check; the chart must agree with it everywhere.
    subgroups, batch = single_readings(TABLE_9_1)
    points, signals = streamed(_montgomery_ewma(), subgroups)
    expected = _independent_ewma(TABLE_9_1, 0.1, 10.0, 1.0, 2.7)
    for point, (z, lower, upper) in zip(points[Statistic.EWMA], expected, strict=True):
        assert point.value == pytest.approx(z, abs=1e-12)
        assert point.lower == pytest.approx(lower, abs=1e-12)
        assert point.upper == pytest.approx(upper, abs=1e-12)
    beyond = [t for t, (z, lo, hi) in enumerate(expected, start=1) if z > hi or z < lo]
    assert beyond[0] == 29
    assert [s.subgroup + 1 for s in signals] == beyond
    assert all(s.side is Side.UPPER for s in signals)
    assert_batch_agrees(_montgomery_ewma(), batch, points, signals)


# ---------------------------------------------------------------- p chart (orange-juice cans)

# Montgomery, p-chart example: 30 samples of n = 50 cans, number nonconforming per sample.
OJ_REJECTS = [
    12, 15, 8, 10, 4, 7, 16, 9, 14, 10, 5, 6, 17, 12, 22,
    8, 10, 5, 13, 11, 20, 18, 24, 15, 9, 12, 7, 13, 9, 6,
]  # fmt: skip
OJ_N = 50


def _p_limits(p, n):
    half = 3 * math.sqrt(p * (1 - p) / n)
    return max(0.0, p - half), p + half


def _oj_batch():
    return SubgroupBatch.from_ragged(
        [float(r) for r in OJ_REJECTS], [1] * len(OJ_REJECTS), exposures=[float(OJ_N)] * 30
    )


def test_p_chart_trial_limits_match_the_printed_values():
    """Trial p-bar 0.2313, UCL 0.4102, LCL 0.0524 (values from memory), also by the formula."""
    estimate = phase_one_attribute(_oj_batch(), kind=AttributeKind.P)
    round_one = [e for e in estimate.excluded if e.round == 1]
    p_bar = sum(OJ_REJECTS) / (30 * OJ_N)  # 347 / 1500
    lower, upper = _p_limits(p_bar, OJ_N)
    assert p_bar == pytest.approx(0.2313, abs=1e-4)
    assert upper == pytest.approx(0.4102, abs=1e-4)
    assert lower == pytest.approx(0.0524, abs=1e-4)
    for exclusion in round_one:
        assert exclusion.upper == pytest.approx(upper, rel=1e-12)
        assert exclusion.lower == pytest.approx(lower, rel=1e-12)


def test_p_chart_phase_one_excludes_samples_15_and_23_then_21():
    """Round 1 excludes samples 15 and 23 (above 0.4102); round 2 excludes sample 21 (0.40)."""
    estimate = phase_one_attribute(_oj_batch(), kind=AttributeKind.P)
    by_round = {}
    for exclusion in estimate.excluded:
        by_round.setdefault(exclusion.round, []).append(exclusion)
        assert exclusion.statistic is Statistic.PROPORTION
        assert exclusion.value == OJ_REJECTS[exclusion.subgroup] / OJ_N
    assert [e.subgroup for e in by_round[1]] == [14, 22]  # samples 15 and 23
    assert [e.subgroup for e in by_round[2]] == [20]  # sample 21
    revised = (sum(OJ_REJECTS) - 22 - 24) / (28 * OJ_N)  # 301 / 1400
    assert revised == pytest.approx(0.2150, abs=1e-4)
    lower, upper = _p_limits(revised, OJ_N)
    assert upper == pytest.approx(0.3893, abs=1e-4)
    assert lower == pytest.approx(0.0407, abs=1e-4)
    assert by_round[2][0].upper == pytest.approx(upper, rel=1e-12)
    assert by_round[2][0].value == pytest.approx(0.40)
    # nothing further is beyond once 21 is out too, so the estimate settles at round 3
    final = (sum(OJ_REJECTS) - 22 - 24 - 20) / (27 * OJ_N)
    lower, upper = _p_limits(final, OJ_N)
    kept = [r / OJ_N for i, r in enumerate(OJ_REJECTS) if i not in {14, 20, 22}]
    assert all(lower <= p <= upper for p in kept)
    assert estimate.parameters.mean == pytest.approx(final, rel=1e-12)
    assert (estimate.used, estimate.rounds, estimate.settled) == (27, 3, True)


def test_p_chart_with_the_revised_center_flags_sample_21():
    """A p chart at p = 0.2150 flags sample 21 (0.40 > 0.3893), and still 15 and 23."""
    revised = 301 / 1400
    subgroups = [Subgroup((float(r),), exposures=(float(OJ_N),)) for r in OJ_REJECTS]
    points, signals = streamed(PChart(proportion=revised), subgroups)
    assert [(s.subgroup + 1, s.side) for s in signals] == [
        (15, Side.UPPER),
        (21, Side.UPPER),
        (23, Side.UPPER),
    ]
    assert signals[1].upper == pytest.approx(0.3893, abs=1e-4)
    assert_batch_agrees(PChart(proportion=revised), _oj_batch(), points, signals)


# ---------------------------------------------------------------- u chart (personal computers)

# Montgomery, u-chart example: 20 samples of 5 computers, total nonconformities per sample.
PC_DEFECTS = [10, 12, 8, 14, 10, 16, 11, 7, 10, 15, 9, 5, 7, 11, 12, 6, 8, 10, 7, 5]
PC_UNITS = 5


def test_u_chart_center_and_limits_match_the_printed_values():
    """u-bar 1.93, UCL 3.79, LCL 0.07 (values from memory), also by u +/- 3 sqrt(u/n)."""
    batch = SubgroupBatch.from_ragged(
        [float(c) for c in PC_DEFECTS], [1] * 20, exposures=[float(PC_UNITS)] * 20
    )
    estimate = phase_one_attribute(batch, kind=AttributeKind.U)
    u_bar = sum(PC_DEFECTS) / (20 * PC_UNITS)
    assert estimate.parameters.mean == pytest.approx(u_bar, rel=1e-12)
    assert estimate.excluded == ()
    assert u_bar == pytest.approx(1.93, abs=0.005)
    subgroups = [Subgroup((float(c),), exposures=(float(PC_UNITS),)) for c in PC_DEFECTS]
    points, signals = streamed(UChart(rate=u_bar), subgroups)
    first = points[Statistic.RATE][0]
    half = 3 * math.sqrt(u_bar / PC_UNITS)
    assert first.upper == pytest.approx(u_bar + half, rel=1e-12)
    assert first.lower == pytest.approx(u_bar - half, rel=1e-12)
    assert first.upper == pytest.approx(3.79, abs=0.005)
    assert first.lower == pytest.approx(0.07, abs=0.005)
    assert signals == []  # no point beyond the limits
    assert_batch_agrees(UChart(rate=u_bar), batch, points, signals)


# ---------------------------------------------------------------- standard-value limits

# Montgomery, Appendix VI, factors for charts with standard values; values from memory.
# Columns: n, A, D1, D2, B5, B6 (A = 3/sqrt(n), D1/D2 = d2 -/+ 3 d3, B5/B6 = c4 -/+ 3 sqrt(1-c4^2)).
STANDARD_FACTORS = {
    2: ("2.121", "0", "3.686", "0", "2.606"),
    5: ("1.342", "0", "4.918", "0", "1.964"),
    10: ("0.949", "0.687", "5.469", "0.276", "1.669"),
}


@pytest.mark.parametrize("n", sorted(STANDARD_FACTORS))
def test_standard_value_limits_match_the_printed_factors(n):
    """With mu = 0, sigma = 1 the chart limits equal A, D1, D2, B5, B6 of Appendix VI (+/-1)."""
    a, d1, d2_, b5, b6 = (float(v) for v in STANDARD_FACTORS[n])
    readings = tuple(np.linspace(-1.0, 1.0, n))
    xbar_r = XbarRChart(mean=0.0, sigma=1.0)
    xbar_r.update(Subgroup(readings))
    mean, spread = xbar_r.last_points
    assert mean.upper == pytest.approx(a, abs=1e-3)
    assert mean.lower == pytest.approx(-a, abs=1e-3)
    assert spread.lower == pytest.approx(d1, abs=1e-3)
    assert spread.upper == pytest.approx(d2_, abs=1e-3)
    xbar_s = XbarSChart(mean=0.0, sigma=1.0)
    xbar_s.update(Subgroup(readings))
    _, spread = xbar_s.last_points
    assert spread.lower == pytest.approx(b5, abs=1e-3)
    assert spread.upper == pytest.approx(b6, abs=1e-3)


@pytest.mark.parametrize("n", range(2, 26))
def test_standard_value_limits_follow_the_constants_for_every_size(n):
    """Mean mu -/+ 3 sigma/sqrt n, range (d2 -/+ 3 d3) sigma, sd (c4 -/+ 3 sqrt(1-c4^2)) sigma."""
    # Montgomery, Appendix VI definitions of A, D1, D2, B5, B6 (lower factors floored at 0).
    mu, sigma, k = 10.0, 2.5, constants(n)
    readings = tuple(mu + np.linspace(-1.0, 1.0, n))
    xbar_r, xbar_s = XbarRChart(mean=mu, sigma=sigma), XbarSChart(mean=mu, sigma=sigma)
    xbar_r.update(Subgroup(readings))
    xbar_s.update(Subgroup(readings))
    mean, range_point = xbar_r.last_points
    _, sd_point = xbar_s.last_points
    assert mean.upper == pytest.approx(mu + 3 * sigma / math.sqrt(n), rel=1e-14)
    assert mean.lower == pytest.approx(mu - 3 * sigma / math.sqrt(n), rel=1e-14)
    assert range_point.center == pytest.approx(k.d2 * sigma, rel=1e-14)
    assert range_point.upper == pytest.approx((k.d2 + 3 * k.d3) * sigma, rel=1e-14)
    assert range_point.lower == pytest.approx(max(0.0, k.d2 - 3 * k.d3) * sigma, abs=1e-14)
    spread_s = 3 * math.sqrt(1 - k.c4**2)
    assert sd_point.center == pytest.approx(k.c4 * sigma, rel=1e-14)
    assert sd_point.upper == pytest.approx((k.c4 + spread_s) * sigma, rel=1e-14)
    assert sd_point.lower == pytest.approx(max(0.0, k.c4 - spread_s) * sigma, abs=1e-14)


# ---------------------------------------------------------------- piston rings, Phase I

PISTON = np.array(PISTON_RING_DIAMETERS)


def test_piston_ring_data_reproduce_the_printed_totals():
    """Grand mean 74.001, R-bar = 0.581/25 = 0.023 and S-bar = 0.0094 from the data."""
    # Montgomery, Examples 6.1 and 6.3 (sum of ranges 0.581 is a value from memory).
    ranges = PISTON.max(axis=1) - PISTON.min(axis=1)
    sds = PISTON.std(axis=1, ddof=1)
    assert PISTON.shape == (25, 5)
    assert PISTON.mean() == pytest.approx(74.001, abs=5e-4)
    assert ranges.sum() == pytest.approx(0.581, abs=5e-4)
    assert ranges.mean() == pytest.approx(0.023, abs=5e-4)
    assert sds.mean() == pytest.approx(0.0094, abs=5e-5)


def _piston_phase_one(estimator, chart_class):
    batch = SubgroupBatch.from_rows(PISTON_RING_DIAMETERS)
    estimate = phase_one(batch, estimator=estimator)
    params = estimate.parameters
    chart = chart_class(mean=params.mean, sigma=params.sigma)
    points, signals = streamed(chart, [Subgroup(tuple(row)) for row in PISTON_RING_DIAMETERS])
    fresh = chart_class(mean=params.mean, sigma=params.sigma)
    assert_batch_agrees(fresh, batch, points, signals)
    return estimate, points, signals


def test_piston_rings_xbar_r_phase_one_matches_example_6_1():
    """x-double-bar 74.001, R-bar 0.023, limits 73.988/74.014, R UCL 0.049, LCL 0, in control."""
    # Montgomery, Example 6.1. The book rounds x-double-bar and R-bar before computing the
    # limits, so the limits are compared at +/-1 in the last printed digit.
    estimate, points, signals = _piston_phase_one(SigmaEstimator.RANGE, XbarRChart)
    params = estimate.parameters
    assert estimate.excluded == ()
    assert (estimate.used, estimate.settled) == (25, True)
    assert params.mean == pytest.approx(PISTON.mean(), rel=1e-14)
    r_bar = (PISTON.max(axis=1) - PISTON.min(axis=1)).mean()
    assert params.sigma == pytest.approx(r_bar / constants(5).d2, rel=1e-12)
    assert params.mean == pytest.approx(74.001, abs=1e-3)
    assert params.sigma * constants(5).d2 == pytest.approx(0.023, abs=1e-3)
    mean_point = points[Statistic.MEAN][0]
    range_point = points[Statistic.RANGE][0]
    assert mean_point.lower == pytest.approx(73.988, abs=1e-3)
    assert mean_point.upper == pytest.approx(74.014, abs=1e-3)
    assert range_point.upper == pytest.approx(0.049, abs=1e-3)
    assert range_point.lower == 0.0
    assert signals == []


def test_piston_rings_xbar_s_phase_one_matches_example_6_3():
    """S-bar 0.0094, x-bar limits 73.988/74.014, S UCL 0.0196, LCL 0, in control."""
    # Montgomery, Example 6.3 (limits compared at +/-1 in the last printed digit).
    estimate, points, signals = _piston_phase_one(SigmaEstimator.SD, XbarSChart)
    params = estimate.parameters
    assert estimate.excluded == ()
    s_bar = PISTON.std(axis=1, ddof=1).mean()
    assert params.sigma == pytest.approx(s_bar / constants(5).c4, rel=1e-12)
    assert params.sigma * constants(5).c4 == pytest.approx(0.0094, abs=1e-4)
    mean_point = points[Statistic.MEAN][0]
    sd_point = points[Statistic.SD][0]
    assert mean_point.lower == pytest.approx(73.988, abs=1e-3)
    assert mean_point.upper == pytest.approx(74.014, abs=1e-3)
    assert sd_point.upper == pytest.approx(0.0196, abs=1e-4)
    assert sd_point.lower == 0.0
    assert signals == []
