"""p-values of a chart's signals under its parent model (monitor.signal_pvalues, spc.arl tail curve).

References used here:
* the law of the mean of n gamma(shape a, scale s) readings is gamma(n a, s / n) (sums of
  independent gammas with a common scale; any probability text), evaluated by scipy.stats;
* the stationary tail of a reflected random walk with normal steps of mean -k falls like
  exp(-theta x) where E exp(theta (Z - k)) = 1, i.e. theta = 2 k (Cramer-Lundberg adjustment
  coefficient; for normal steps exp(theta^2 / 2 - theta k) = 1 in closed form);
* a seeded Monte Carlo of the CUSUM recursion as an independent witness.
"""

from __future__ import annotations

import asyncio
import math

import numpy as np
import pytest
from scipy import stats

from monitor.signal_pvalues import (
    ChartPValues,
    LawWorkshop,
    choose_parent,
    parent_from_record,
    parent_record,
    parse_parent_choice,
)
from monitor.spc import (
    ChartKind,
    ChartSet,
    ChartSpec,
    ConfigError,
    ProcessParameters,
    Subgroup,
)
from monitor.spc.arl import cusum_tail, cusum_tail_curve
from monitor.spc.chartset import CusumSettings
from monitor.spc.parents import Parent


def settle(workshop: LawWorkshop) -> None:
    assert asyncio.run(workshop.settled(120.0))


# ---------------------------------------------------------------- the setting


@pytest.mark.parametrize(
    ("text", "mode", "families"),
    [
        ("normal", "normal", ()),
        ("auto", "fit", ("normal", "lognormal", "gamma", "weibull")),
        ("empirical", "fit", ("empirical",)),
        ("Gamma", "fit", ("gamma",)),
        ("weibull:shape=1.5,scale=2", "fixed", ()),
    ],
)
def test_parent_settings_are_read(text, mode, families):
    choice = parse_parent_choice(text)
    assert choice.mode == mode
    assert choice.families == families


@pytest.mark.parametrize(
    ("text", "says"),
    [
        ("cauchy", "allowed: normal, auto, empirical"),
        ("gamma:shape=2", "missing: scale"),
        ("gamma:shape=-1,scale=2", "shape must be a positive number"),
        ("triangular:low=0,mode=5,high=1", "triangular"),
        ("  ", "non-empty"),
    ],
)
def test_bad_parent_settings_say_what_is_allowed(text, says):
    with pytest.raises(ConfigError, match=says):
        parse_parent_choice(text)


def test_records_give_back_the_same_parent_also_an_empirical_one():
    gamma = Parent.of("gamma", shape=2.5, scale=0.75)
    assert parent_from_record(parent_record(gamma)) == gamma
    sample = np.random.default_rng(5).gamma(2.0, 1.0, 300)
    parent, _ = choose_parent(sample, parse_parent_choice("empirical"))
    again = parent_from_record(parent_record(parent, sample))
    assert again == parent
    with pytest.raises(ConfigError):
        parent_from_record({"name": "gamma"})


# ---------------------------------------------------------------- fitting


def test_clearly_skewed_readings_get_a_skewed_family():
    sample = np.random.default_rng(11).gamma(1.5, 2.0, 2000)
    parent, how = choose_parent(sample, parse_parent_choice("auto"))
    assert parent.name in ("gamma", "weibull")  # both shape families can fit a gamma sample
    assert "AIC" in how
    # the fitted mean is the sample's (maximum likelihood for gamma keeps the mean)
    assert parent.mean() == pytest.approx(sample.mean(), rel=0.05)


def test_normal_readings_keep_the_normal_model():
    # normal data: lognormal and gamma with large shapes fit about as well; the simpler model is kept
    for seed in range(5):
        sample = np.random.default_rng(seed).normal(50.0, 2.0, 300)
        parent, _ = choose_parent(sample, parse_parent_choice("auto"))
        assert parent.name == "normal", seed


def test_too_few_readings_to_fit_are_refused():
    with pytest.raises(ConfigError, match="at least 20"):
        choose_parent([1.0, 2.0, 3.0], parse_parent_choice("auto"))


# ---------------------------------------------------------------- CUSUM tail curve


def test_cusum_tail_curve_agrees_with_the_chain_at_any_value():
    curve = cusum_tail_curve(0.5, 4.0)
    for x in (4.01, 5.3, 9.9, 14.2):  # signals: sums beyond h
        assert curve(x) == pytest.approx(cusum_tail(0.5, 4.0, x), rel=1e-5)
    for x in (0.37, 1.0):  # near the atom at 0 the discretised chains agree less closely
        assert curve(x) == pytest.approx(cusum_tail(0.5, 4.0, x), rel=1e-3)


@pytest.mark.parametrize("k", [0.25, 0.5, 1.0])
def test_cusum_tail_falls_at_the_adjustment_coefficient(k):
    curve = cusum_tail_curve(k, 5.0)
    xs, logs = curve.xs, curve.log_tails
    far = xs > 0.75 * xs[-1]
    slope = np.polyfit(xs[far], logs[far], 1)[0]
    assert slope == pytest.approx(-2.0 * k, rel=2e-3)


def test_cusum_tail_curve_matches_a_seeded_simulation_of_the_sums():
    rng = np.random.default_rng(2024)
    k, chains, steps = 0.5, 40_000, 400
    c = np.zeros(chains)
    for _ in range(steps):  # long enough to forget the start (mean return time is a few steps)
        c = np.maximum(0.0, c + rng.standard_normal(chains) - k)
    curve = cusum_tail_curve(k, 5.0)
    for x in (1.0, 2.5, 4.0):
        observed = float(np.mean(c > x))
        se = math.sqrt(observed * (1 - observed) / chains)
        assert abs(observed - curve(x)) < 4 * se + 1e-4


def test_lower_side_of_a_skewed_law_differs_from_the_upper_side():
    parent = Parent.of("exponential", mean=1.0)
    n = 4
    law = stats.gamma(n, scale=1.0 / n)  # mean of 4 unit exponentials

    def cdf(z):
        return law.cdf(1.0 + np.asarray(z) * 0.5)

    upper = cusum_tail_curve(0.5, 4.0, cdf=cdf, side="upper")(4.5)
    lower = cusum_tail_curve(0.5, 4.0, cdf=cdf, side="lower")(4.5)
    assert parent.mean() == 1.0
    assert upper > 2 * lower  # a right-skewed mean rises far more often than it falls that much


# ---------------------------------------------------------------- signals of a chart


def _xbar_signal(mean: float, sigma: float, values: tuple[float, ...]):
    spec = ChartSpec(kinds=(ChartKind.XBAR_R,), standard=ProcessParameters(mean, sigma))
    charts = ChartSet(spec)
    signals = charts.update(Subgroup(values))
    assert signals, "the subgroup was meant to be beyond the limits"
    return spec, signals[0]


def test_a_fixed_gamma_parent_gives_the_exact_tail_of_the_mean_once_its_law_is_built():
    workshop = LawWorkshop()
    try:
        spec, signal = _xbar_signal(8.0, 4.0, (15.0, 16.0, 14.0, 17.0))  # mean 15.5 > 8 + 3 * 2
        model = ChartPValues("c", spec, parse_parent_choice("gamma:shape=4,scale=2"), workshop)
        model.prepare(ProcessParameters(8.0, 4.0), 4)
        settle(workshop)
        result = model.of(signal, 4, ProcessParameters(8.0, 4.0))
        expected = stats.gamma(16.0, scale=0.5).sf(15.5)  # mean of 4 gamma(4, 2) readings
        assert result.value == pytest.approx(expected, rel=1e-9)
        assert result.method == "closed form"
        assert result.parent == "gamma(shape=4, scale=2)"
        # and the normal-theory p-value would have been far smaller
        normal = ChartPValues("c", spec, parse_parent_choice("normal"), workshop).of(signal, 4, None)
        assert normal.value is not None
        assert normal.value < expected / 10
    finally:
        workshop.close()


def test_until_the_law_is_built_the_normal_approximation_is_used_and_said():
    workshop = LawWorkshop()
    try:
        spec, signal = _xbar_signal(1.5, 0.6, (3.4, 3.5, 3.1, 3.3))
        model = ChartPValues("c", spec, parse_parent_choice("lognormal:log_mean=0.3,log_sd=0.4"), workshop)
        first = model.of(signal, 4, ProcessParameters(1.5, 0.6))
        assert first.method.startswith("normal approximation")
        assert "being built" in first.method
        assert first.value == pytest.approx(stats.norm.sf(signal.z), rel=1e-12)
        settle(workshop)
        later = model.of(signal, 4, ProcessParameters(1.5, 0.6))
        assert later.method == "convolution"
        assert later.parent.startswith("lognormal")
    finally:
        workshop.close()


def test_a_fitted_parent_is_used_once_fitted_and_survives_a_checkpoint():
    workshop = LawWorkshop()
    try:
        spec, signal = _xbar_signal(2.0, 1.0, (4.0, 4.5, 3.9, 4.2, 4.1))
        choice = parse_parent_choice("gamma")
        model = ChartPValues("c", spec, choice, workshop)
        sample = list(np.random.default_rng(9).gamma(4.0, 0.5, 200))
        model.fit(sample)
        assert "not fitted yet" in model.of(signal, 5, None).method
        assert "not fitted yet" in model.described
        settle(workshop)
        model.prepare(ProcessParameters(2.0, 1.0), 5)
        settle(workshop)
        result = model.of(signal, 5, ProcessParameters(2.0, 1.0))
        assert model.parent is not None
        assert model.parent.name == "gamma"
        shape, scale = model.parent.param("shape"), model.parent.param("scale")
        assert result.value == pytest.approx(
            stats.gamma(5 * shape, scale=scale / 5).sf(signal.value), rel=1e-9
        )
        again = ChartPValues("c", spec, choice, workshop)
        again.restore(model.to_state())
        assert again.parent == model.parent
    finally:
        workshop.close()


def test_cusum_signals_get_the_tail_of_the_stationary_sum():
    workshop = LawWorkshop()
    try:
        spec = ChartSpec(
            kinds=(ChartKind.CUSUM,),
            standard=ProcessParameters(0.0, 1.0),
            cusum=CusumSettings(k=0.5, h=4.0),
        )
        charts = ChartSet(spec)
        signals = []
        for _ in range(6):
            signals = charts.update(Subgroup((1.6,)))
        assert signals
        model = ChartPValues("c", spec, parse_parent_choice("normal"), workshop)
        model.prepare(ProcessParameters(0.0, 1.0), 1)
        settle(workshop)
        result = model.of(signals[0], 1, ProcessParameters(0.0, 1.0))
        assert result.method.startswith("Markov chain")
        assert result.value == pytest.approx(cusum_tail(0.5, 4.0, signals[0].value), rel=1e-4)
    finally:
        workshop.close()
