"""Phase I estimation: sigma estimators, the grand mean, and iterative exclusion.

The estimators are the textbook ones (Montgomery, *Introduction to Statistical Quality
Control*, the X-bar/R, X-bar/S and individuals chapters): sigma = R-bar/d2, S-bar/c4,
MR-bar/d2(2), and for the pooled standard deviation S_p / c4(nu + 1) with
nu = sum(n_i - 1) -- E[S_p] = c4(nu + 1) sigma because nu S_p^2 / sigma^2 is chi-square with nu
degrees of freedom (standard distribution theory). Each is recomputed here with numpy
directly. Where subgroups of 2 and 3 readings are used, d2 and c4 come from their closed
forms (d2 = 2/sqrt(pi), 3/sqrt(pi); c4 = sqrt(2/pi), sqrt(pi)/2), independent of the code.

Trial limits for exclusion are the 3-sigma limits of the mean and of the spread statistic
computed from the subgroups still kept, repeated until nothing new falls outside: common
practice in Phase I (Montgomery, Phase I discussion), with the caps of ``phase_one``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

from monitor.spc import (
    AttributeKind,
    ConfigError,
    NotEnoughData,
    SigmaEstimator,
    Statistic,
    SubgroupBatch,
    constants,
    estimate_sigma,
    phase_one,
    phase_one_attribute,
)

D2 = {2: 2 / math.sqrt(math.pi), 3: 3 / math.sqrt(math.pi)}
C4 = {2: math.sqrt(2 / math.pi), 3: math.sqrt(math.pi) / 2}


def _c4_from_gamma(n):
    return math.sqrt(2 / (n - 1)) * special.gamma(n / 2) / special.gamma((n - 1) / 2)


def _ragged(seed, sizes, mean=50.0, sigma=2.0):
    rng = np.random.default_rng(seed)
    rows = [rng.normal(mean, sigma, n) for n in sizes]
    return rows, SubgroupBatch.from_ragged(np.concatenate(rows), sizes)


SIZES = [2, 3, 3, 2, 3, 2, 2, 3, 3, 3, 2, 2, 3, 2, 3, 3, 2, 3, 2, 2]


# ---------------------------------------------------------------- the estimators


def test_range_estimator_is_the_mean_of_r_over_d2_per_subgroup():
    """sigma = mean of R_i / d2(n_i), with d2 from the closed forms for n = 2 and 3."""
    rows, batch = _ragged(11, SIZES)
    expected = np.mean([np.ptp(r) / D2[len(r)] for r in rows])
    assert estimate_sigma(batch, SigmaEstimator.RANGE) == pytest.approx(expected, rel=1e-12)


def test_range_estimator_is_r_bar_over_d2_for_equal_sizes():
    """For equal subgroups of 5, sigma = R-bar / d2(5)."""
    rng = np.random.default_rng(12)
    rows = rng.normal(0.0, 3.0, (25, 5))
    expected = np.ptp(rows, axis=1).mean() / constants(5).d2
    got = estimate_sigma(SubgroupBatch.from_rows(rows), SigmaEstimator.RANGE)
    assert got == pytest.approx(expected, rel=1e-12)


def test_sd_estimator_is_the_mean_of_s_over_c4_per_subgroup():
    """sigma = mean of S_i / c4(n_i), S with divisor n - 1, c4 from the closed forms."""
    rows, batch = _ragged(13, SIZES)
    expected = np.mean([np.std(r, ddof=1) / C4[len(r)] for r in rows])
    assert estimate_sigma(batch, SigmaEstimator.SD) == pytest.approx(expected, rel=1e-12)


def test_pooled_estimator_divides_the_pooled_sd_by_c4_of_the_total_degrees_of_freedom_plus_one():
    """sigma = sqrt(sum (n_i-1) S_i^2 / nu) / c4(nu + 1), nu = sum (n_i - 1), c4 via scipy gamma."""
    rows, batch = _ragged(14, SIZES)
    dof = np.array([len(r) - 1 for r in rows])
    variances = np.array([np.var(r, ddof=1) for r in rows])
    nu = int(dof.sum())
    pooled = math.sqrt(float((dof * variances).sum()) / nu)
    expected = pooled / _c4_from_gamma(nu + 1)
    assert estimate_sigma(batch, SigmaEstimator.POOLED) == pytest.approx(expected, rel=1e-12)


def test_moving_range_estimator_is_mr_bar_over_two_over_root_pi():
    """For single readings, sigma = mean |x_i - x_(i-1)| / d2(2), d2(2) = 2/sqrt(pi)."""
    rng = np.random.default_rng(15)
    x = rng.normal(100.0, 4.0, 60)
    expected = np.abs(np.diff(x)).mean() / D2[2]
    got = estimate_sigma(SubgroupBatch.from_rows(x), SigmaEstimator.MOVING_RANGE)
    assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("estimator", [SigmaEstimator.RANGE, SigmaEstimator.SD, SigmaEstimator.POOLED])
def test_a_keep_mask_gives_the_estimate_of_the_kept_subgroups_alone(estimator):
    """Estimating with a keep mask equals estimating on a batch of only the kept subgroups."""
    rows, batch = _ragged(16, SIZES)
    keep = np.ones(len(rows), dtype=bool)
    keep[[1, 6, 13]] = False
    kept_rows = [r for r, k in zip(rows, keep, strict=True) if k]
    kept = SubgroupBatch.from_ragged(np.concatenate(kept_rows), [len(r) for r in kept_rows])
    assert estimate_sigma(batch, estimator, keep) == pytest.approx(estimate_sigma(kept, estimator), rel=1e-12)


def test_moving_ranges_touching_an_excluded_reading_are_dropped():
    """With reading 5 left out, the moving ranges 4-5 and 5-6 are not used (not bridged)."""
    rng = np.random.default_rng(17)
    x = rng.normal(0.0, 1.0, 12)
    keep = np.ones(12, dtype=bool)
    keep[5] = False
    pairs = [abs(x[i] - x[i - 1]) for i in range(1, 12) if keep[i] and keep[i - 1]]
    assert len(pairs) == 9
    got = estimate_sigma(SubgroupBatch.from_rows(x), SigmaEstimator.MOVING_RANGE, keep)
    assert got == pytest.approx(np.mean(pairs) / D2[2], rel=1e-12)


def test_the_grand_mean_weights_every_reading_equally():
    """With unequal subgroup sizes the mean is the mean of all readings, not of the means."""
    rows, batch = _ragged(18, SIZES)
    estimate = phase_one(batch, estimator=SigmaEstimator.RANGE, exclude_out_of_control=False)
    assert estimate.parameters.mean == pytest.approx(np.concatenate(rows).mean(), rel=1e-14)
    assert estimate.parameters.source == "baseline"
    assert (estimate.rounds, estimate.excluded, estimate.used, estimate.settled) == (
        0,
        (),
        len(SIZES),
        True,
    )


def test_moving_range_estimator_refuses_subgroups_of_several_readings():
    """The moving_range estimator needs one reading per subgroup."""
    batch = SubgroupBatch.from_rows([[1.0, 2.0], [2.0, 3.0]])
    with pytest.raises(ConfigError, match="one reading per subgroup"):
        estimate_sigma(batch, SigmaEstimator.MOVING_RANGE)


@pytest.mark.parametrize("estimator", [SigmaEstimator.RANGE, SigmaEstimator.SD, SigmaEstimator.POOLED])
def test_subgroup_estimators_refuse_single_readings(estimator):
    """range, sd and pooled need subgroups of at least 2 readings."""
    with pytest.raises(ConfigError, match="at least 2 readings"):
        estimate_sigma(SubgroupBatch.from_rows([1.0, 2.0, 3.0]), estimator)


# ---------------------------------------------------------------- not enough data


def test_phase_one_with_one_subgroup_raises_not_enough_data():
    """A single baseline subgroup is not enough: needs 2, has 1."""
    with pytest.raises(NotEnoughData, match="needs 2 subgroups, has 1") as caught:
        phase_one(SubgroupBatch.from_rows([[1.0, 2.0, 3.0]]), estimator=SigmaEstimator.RANGE)
    assert (caught.value.needed, caught.value.have) == (2, 1)


def test_attribute_phase_one_with_one_subgroup_raises_not_enough_data():
    """A p baseline of one sample is not enough either."""
    batch = SubgroupBatch.from_ragged([3.0], [1], exposures=[50.0])
    with pytest.raises(NotEnoughData, match="needs 2 subgroups, has 1"):
        phase_one_attribute(batch, kind=AttributeKind.P)


def test_moving_range_estimate_from_one_reading_raises_not_enough_data():
    """One reading gives no moving range."""
    with pytest.raises(NotEnoughData, match="consecutive readings"):
        estimate_sigma(SubgroupBatch.from_rows([4.0]), SigmaEstimator.MOVING_RANGE)


@pytest.mark.parametrize("share", [-0.1, 1.0, 1.5])
def test_an_excluded_share_outside_zero_to_one_raises_config_error(share):
    """max_excluded_share must be at least 0 and below 1."""
    batch = SubgroupBatch.from_rows([[1.0, 2.0], [2.0, 3.5], [1.5, 2.5]])
    with pytest.raises(ConfigError, match="max_excluded_share"):
        phase_one(batch, estimator=SigmaEstimator.RANGE, max_excluded_share=share)


# ---------------------------------------------------------------- iterative exclusion

# A deterministic baseline of 20 subgroups of 4. In-control subgroups have range 2 and means
# 9.8 .. 10.2. Subgroup 4 has range 20 (mean 10): it inflates R-bar and so masks subgroup 12,
# whose mean is 11.7. Subgroup 16 has mean 6. Expected: round 1 excludes 4 (range) and 16
# (mean); round 2, with R-bar back to 2, excludes 12 (mean); round 3 finds nothing.
OFFSETS = np.array([-1.0, -0.3, 0.3, 1.0])


def _masked_baseline():
    rows = np.array([10.0 + 0.1 * ((i % 5) - 2) + OFFSETS for i in range(20)])
    rows[4] = 10.0 + np.array([-10.0, -0.3, 0.3, 10.0])
    rows[12] = 11.7 + OFFSETS
    rows[16] = 6.0 + OFFSETS
    return rows


def _trial_limits(rows, keep):
    """Textbook trial limits from the kept subgroups: x-bar-bar -/+ 3 sigma/2, D3/D4 times R-bar."""
    k = constants(4)
    grand = rows[keep].mean()
    r_bar = np.ptp(rows[keep], axis=1).mean()
    sigma = r_bar / k.d2
    half = 3 * sigma / math.sqrt(4)
    return (grand - half, grand + half), (max(0.0, k.d2 - 3 * k.d3) * sigma, k.D4 * r_bar)


def test_exclusion_rounds_report_subgroup_statistic_value_limits_and_round():
    """Round 1 drops 4 (range) and 16 (mean); round 2 drops the masked 12 (mean); then settled."""
    rows = _masked_baseline()
    estimate = phase_one(SubgroupBatch.from_rows(rows), estimator=SigmaEstimator.RANGE)
    got = [(e.subgroup, e.statistic, e.round) for e in estimate.excluded]
    assert got == [
        (4, Statistic.RANGE, 1),
        (16, Statistic.MEAN, 1),
        (12, Statistic.MEAN, 2),
    ]
    keep = np.ones(20, dtype=bool)
    (mean_lo, mean_hi), (r_lo, r_hi) = _trial_limits(rows, keep)
    assert mean_lo < rows[12].mean() < mean_hi  # subgroup 12 is masked in round 1
    four, sixteen, twelve = estimate.excluded
    assert four.value == pytest.approx(20.0)
    assert (four.lower, four.upper) == pytest.approx((r_lo, r_hi), rel=1e-12)
    assert sixteen.value == pytest.approx(6.0)
    assert (sixteen.lower, sixteen.upper) == pytest.approx((mean_lo, mean_hi), rel=1e-12)
    keep[[4, 16]] = False
    (mean_lo, mean_hi), _ = _trial_limits(rows, keep)
    assert twelve.value == pytest.approx(11.7)
    assert (twelve.lower, twelve.upper) == pytest.approx((mean_lo, mean_hi), rel=1e-12)
    keep[12] = False
    assert estimate.parameters.mean == pytest.approx(rows[keep].mean(), rel=1e-14)
    assert estimate.parameters.sigma == pytest.approx(
        np.ptp(rows[keep], axis=1).mean() / constants(4).d2, rel=1e-12
    )
    assert (estimate.rounds, estimate.settled, estimate.used, estimate.subgroups) == (3, True, 17, 20)


def test_exclusions_are_numbered_from_first_index():
    """With first_index 1000 the excluded subgroups are reported as 1004, 1016, 1012."""
    estimate = phase_one(
        SubgroupBatch.from_rows(_masked_baseline()),
        estimator=SigmaEstimator.RANGE,
        first_index=1000,
    )
    assert [e.subgroup for e in estimate.excluded] == [1004, 1016, 1012]


def test_max_rounds_stops_the_exclusion_unsettled():
    """With max_rounds 1 only round 1's exclusions are made and the estimate is not settled."""
    rows = _masked_baseline()
    estimate = phase_one(SubgroupBatch.from_rows(rows), estimator=SigmaEstimator.RANGE, max_rounds=1)
    assert [e.subgroup for e in estimate.excluded] == [4, 16]
    assert (estimate.rounds, estimate.settled, estimate.used) == (1, False, 18)
    keep = np.ones(20, dtype=bool)
    keep[[4, 16]] = False
    assert estimate.parameters.mean == pytest.approx(rows[keep].mean(), rel=1e-14)


def test_the_excluded_share_cap_keeps_the_round_that_would_pass_it():
    """With at most 10% excluded, round 1 (2 of 20) is made and round 2 (a third) is not."""
    estimate = phase_one(
        SubgroupBatch.from_rows(_masked_baseline()),
        estimator=SigmaEstimator.RANGE,
        max_excluded_share=0.10,
    )
    assert [e.subgroup for e in estimate.excluded] == [4, 16]
    assert all(e.round == 1 for e in estimate.excluded)
    assert (estimate.rounds, estimate.settled, estimate.used) == (2, False, 18)


def test_the_excluded_share_cap_excludes_nothing_when_the_first_round_would_pass_it():
    """With at most 5% excluded, round 1 would drop 2 of 20: nothing is excluded, not settled."""
    rows = _masked_baseline()
    batch = SubgroupBatch.from_rows(rows)
    estimate = phase_one(batch, estimator=SigmaEstimator.RANGE, max_excluded_share=0.05)
    assert estimate.excluded == ()
    assert (estimate.rounds, estimate.settled, estimate.used) == (1, False, 20)
    assert estimate.parameters.mean == pytest.approx(rows.mean(), rel=1e-14)
    assert estimate.parameters.sigma == pytest.approx(
        np.ptp(rows, axis=1).mean() / constants(4).d2, rel=1e-12
    )


def test_sd_exclusion_uses_the_s_chart_limits():
    """With the sd estimator the wide subgroup is excluded on its S against c4 -/+ 3 sqrt(1-c4^2)."""
    rows = _masked_baseline()
    estimate = phase_one(SubgroupBatch.from_rows(rows), estimator=SigmaEstimator.SD)
    first = estimate.excluded[0]
    assert (first.subgroup, first.statistic, first.round) == (4, Statistic.SD, 1)
    k = constants(4)
    sigma = np.mean(rows.std(axis=1, ddof=1)) / k.c4
    assert first.value == pytest.approx(rows[4].std(ddof=1), rel=1e-12)
    assert first.upper == pytest.approx((k.c4 + 3 * math.sqrt(1 - k.c4**2)) * sigma, rel=1e-12)


def test_an_individuals_spike_is_excluded_on_the_individual_statistic():
    """A reading 8 sigma out is excluded in round 1 as an individual beyond x-bar -/+ 3 MR-bar/d2."""
    rng = np.random.default_rng(19)
    x = rng.normal(0.0, 1.0, 40)
    x[10] += 8.0
    estimate = phase_one(SubgroupBatch.from_rows(x), estimator=SigmaEstimator.MOVING_RANGE)
    spikes = [e for e in estimate.excluded if e.subgroup == 10]
    assert len(spikes) == 1
    spike = spikes[0]
    assert (spike.statistic, spike.round, spike.value) == (Statistic.INDIVIDUAL, 1, x[10])
    sigma = np.abs(np.diff(x)).mean() / D2[2]
    assert spike.upper == pytest.approx(x.mean() + 3 * sigma, rel=1e-12)
    assert spike.lower == pytest.approx(x.mean() - 3 * sigma, rel=1e-12)


# ---------------------------------------------------------------- unbiasedness (simulation)

# Common practice, no source: R-bar/d2, S-bar/c4, MR-bar/d2(2) and S_p/c4(nu+1) are unbiased
# for sigma with normal data. Seeded, so the outcome is deterministic; 4 standard errors.


@pytest.mark.parametrize(
    ("estimator", "per_subgroup"),
    [
        (SigmaEstimator.RANGE, lambda rows: np.ptp(rows, axis=1) / constants(4).d2),
        (SigmaEstimator.SD, lambda rows: rows.std(axis=1, ddof=1) / constants(4).c4),
    ],
)
def test_range_and_sd_estimators_are_unbiased_in_simulation(estimator, per_subgroup):
    """Over 40000 normal subgroups of 4 with sigma 2, the estimate is 2 within 4 SE."""
    rng = np.random.default_rng(2024)
    rows = rng.normal(5.0, 2.0, (40_000, 4))
    got = estimate_sigma(SubgroupBatch.from_rows(rows), estimator)
    standard_error = per_subgroup(rows).std(ddof=1) / math.sqrt(len(rows))
    assert abs(got - 2.0) < 4 * standard_error


def test_pooled_estimator_is_unbiased_over_many_small_baselines():
    """Over 4000 baselines of three subgroups of 3 (nu = 6), the mean estimate is sigma (4 SE)."""
    rng = np.random.default_rng(1956)
    sigma = 1.5
    estimates, uncorrected = [], []
    for _ in range(4000):
        rows = rng.normal(0.0, sigma, (3, 3))
        estimate = estimate_sigma(SubgroupBatch.from_rows(rows), SigmaEstimator.POOLED)
        estimates.append(estimate)
        uncorrected.append(math.sqrt(rows.var(axis=1, ddof=1).mean()))
    estimates = np.array(estimates)
    standard_error = estimates.std(ddof=1) / math.sqrt(len(estimates))
    assert abs(estimates.mean() - sigma) < 4 * standard_error
    # power check: without the c4(7) = 0.9594 correction the bias is visible at this size
    assert sigma - np.mean(uncorrected) > 4 * standard_error


def test_moving_range_estimator_is_unbiased_in_simulation():
    """Over 200000 normal readings with sigma 3, MR-bar/d2(2) is 3 within 4 SE."""
    rng = np.random.default_rng(1984)
    x = rng.normal(20.0, 3.0, 200_000)
    got = estimate_sigma(SubgroupBatch.from_rows(x), SigmaEstimator.MOVING_RANGE)
    terms = np.abs(np.diff(x)) / D2[2]
    centred = terms - terms.mean()
    # adjacent moving ranges share a reading: the variance of their mean has a lag-1 term
    lag0 = np.mean(centred * centred)
    lag1 = np.mean(centred[1:] * centred[:-1])
    standard_error = math.sqrt((lag0 + 2 * lag1) / len(terms))
    assert abs(got - 3.0) < 4 * standard_error
