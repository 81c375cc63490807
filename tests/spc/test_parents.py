"""Parent models of single readings: text form, every family against scipy.stats, fitting.

References named beside the checks:

* scipy.stats (a reference library): ``norm``, ``lognorm``, ``gamma``, ``expon``,
  ``weibull_min``, ``uniform``, ``triang``; ``goodness_of_fit`` for the Anderson-Darling
  statistic, ``gamma.fit`` for the maximum-likelihood gamma. scipy's triangular law loses its
  tails (it computes them as ``1 - cdf``), so its tails are checked against its defining
  formulas evaluated with mpmath at 40 digits.
* Silverman, B. W. (1986), *Density Estimation for Statistics and Data Analysis*, eq. 3.31: the
  rule-of-thumb bandwidth ``0.9 min(sd, IQR / 1.349) N**(-1/5)``.

Samples are drawn with fixed seeds; no seed was chosen to make a check pass.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from scipy import stats

from monitor.spc.errors import ConfigError, NotEnoughData, StateError
from monitor.spc.parents import FAMILIES, Parent, empirical, fit_parent, parse_parent

# (text, frozen scipy distribution with the same parameters)
FAMILY_CASES = [
    ("normal:mean=16,sd=6", stats.norm(16.0, 6.0)),
    ("lognormal:log_mean=2.7,log_sd=0.25", stats.lognorm(0.25, scale=math.exp(2.7))),
    ("lognormal:log_mean=0,log_sd=1", stats.lognorm(1.0, scale=1.0)),
    ("gamma:shape=2.5,scale=3", stats.gamma(2.5, scale=3.0)),
    ("gamma:shape=0.6,scale=2", stats.gamma(0.6, scale=2.0)),
    ("exponential:mean=4", stats.expon(scale=4.0)),
    ("weibull:shape=1.5,scale=10", stats.weibull_min(1.5, scale=10.0)),
    ("weibull:shape=0.7,scale=2", stats.weibull_min(0.7, scale=2.0)),
    ("uniform:low=0,high=32", stats.uniform(0.0, 32.0)),
    ("triangular:low=0,mode=16,high=32", stats.triang(0.5, loc=0.0, scale=32.0)),
    ("triangular:low=2,mode=5,high=30", stats.triang(3.0 / 28.0, loc=2.0, scale=28.0)),
    ("triangular:low=0,mode=0,high=10", stats.triang(0.0, loc=0.0, scale=10.0)),
]
IDS = [text.split(":")[0] + "-" + str(i) for i, (text, _) in enumerate(FAMILY_CASES)]


def _triangle(reference):
    c = reference.args[0] if reference.args else reference.kwds["c"]
    loc, scale = reference.kwds["loc"], reference.kwds["scale"]
    return mpmath.mpf(loc), mpmath.mpf(loc) + c * mpmath.mpf(scale), mpmath.mpf(loc) + mpmath.mpf(scale)


def reference_sf(reference, x):
    """Survival function of the reference, accurate in the upper tail.

    scipy's triangular law computes its tails as 1 - cdf and 1 - q, which loses them; for it the
    defining formulas are evaluated with mpmath at 40 digits instead.
    """
    if reference.dist.name != "triang":
        return reference.sf(x)
    a, c, b = _triangle(reference)
    out = []
    with mpmath.workdps(40):
        for value in np.atleast_1d(x).tolist():
            v = mpmath.mpf(value)
            if v <= c:
                out.append(1 - (v - a) ** 2 / ((b - a) * (c - a)) if c > a else mpmath.mpf(1))
            else:
                out.append((b - v) ** 2 / ((b - a) * (b - c)))
    return np.array([float(o) for o in out])


def reference_cdf(reference, x):
    """Distribution function of the reference (triangular: its formulas with mpmath, as above)."""
    if reference.dist.name != "triang":
        return reference.cdf(x)
    a, c, b = _triangle(reference)
    out = []
    with mpmath.workdps(40):
        for value in np.atleast_1d(x).tolist():
            v = mpmath.mpf(value)
            if v >= c:
                out.append(1 - (b - v) ** 2 / ((b - a) * (b - c)) if b > c else mpmath.mpf(1))
            else:
                out.append((v - a) ** 2 / ((b - a) * (c - a)))
    return np.array([float(o) for o in out])


def reference_ppf(reference, q, *, upper=False):
    """Quantiles (upper: P(X > x) = q) of the reference (triangular: its formulas with mpmath)."""
    if reference.dist.name != "triang":
        return reference.isf(q) if upper else reference.ppf(q)
    a, c, b = _triangle(reference)
    out = []
    with mpmath.workdps(40):
        for p in np.atleast_1d(q).tolist():
            lower = 1 - mpmath.mpf(p) if upper else mpmath.mpf(p)
            if lower <= (c - a) / (b - a):
                out.append(a + mpmath.sqrt(lower * (b - a) * (c - a)))
            else:
                out.append(b - mpmath.sqrt((1 - lower) * (b - a) * (b - c)))
    return np.array([float(o) for o in out])


# ------------------------------------------------------------------ text


@pytest.mark.parametrize(("text", "reference"), FAMILY_CASES, ids=IDS)
def test_describe_reads_back_to_the_same_parent(text, reference):
    """describe() gives text that parse_parent reads back to an equal parent, in both written forms."""
    parent = parse_parent(text)
    assert parse_parent(parent.describe()) == parent
    name, _, body = text.partition(":")
    assert parse_parent(f"{name}({body.replace(',', ', ')})") == parent
    assert hash(parse_parent(parent.describe())) == hash(parent)


def test_parameters_may_be_given_in_any_order_and_are_written_in_the_family_order():
    """Keys in any order give the same parent; describe() writes them in the order of FAMILIES."""
    parent = parse_parent("triangular:high=32,low=0,mode=6")
    assert parent.describe() == "triangular(low=0, mode=6, high=32)"
    assert [k for k, _ in parent.params] == list(FAMILIES["triangular"])


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ("gauss:mean=1,sd=2", ["unknown parent 'gauss'", "allowed"]),
        ("normal:mean=1", ["missing: sd"]),
        ("normal:mean=1,sd=2,skew=3", ["unknown: skew"]),
        ("normal:mean=1,sd=two", ["sd must be a number", "'two'"]),
        ("normal:mean=1,sd=-2", ["sd must be a positive number"]),
        ("normal:mean=1,sd=nan", ["sd must be a finite number"]),
        ("normal", ["normal needs parameters mean, sd"]),
        ("normal:mean=1,mean=2,sd=1", ["given twice"]),
        ("normal:mean 1,sd=2", ["write key=value"]),
        ("uniform:low=5,high=1", ["low must be below high"]),
        ("triangular:low=0,mode=40,high=32", ["low <= mode <= high"]),
        ("gamma:shape=0,scale=1", ["shape must be a positive number"]),
        ("weibull:shape=2,scale=-1", ["scale must be a positive number"]),
        ("lognormal:log_mean=0,log_sd=0", ["log_sd must be a positive number"]),
        ("exponential:mean=-3", ["mean must be a positive number"]),
        ("empirical:readings=3", ["empirical parents cannot be written as text"]),
        ("normal[mean=1]", ["cannot read parent"]),
    ],
)
def test_bad_text_is_refused_with_a_message_that_says_what_is_wrong(text, words):
    """Each mistake in a parent's text raises ConfigError naming the problem."""
    with pytest.raises(ConfigError) as caught:
        parse_parent(text)
    message = str(caught.value)
    for word in words:
        assert word in message, message


def test_parse_parent_refuses_what_is_not_text():
    """A number instead of text is a configuration error, not a crash."""
    with pytest.raises(ConfigError, match="must be text"):
        parse_parent(3.0)  # type: ignore[arg-type]


# ------------------------------------------------------------------ families against scipy


@pytest.mark.parametrize(("text", "reference"), FAMILY_CASES, ids=IDS)
def test_mean_and_sd_equal_scipy(text, reference):
    """Each family's mean and standard deviation equal scipy.stats' for the same parameters."""
    parent = parse_parent(text)
    assert parent.mean() == pytest.approx(reference.mean(), rel=1e-13)
    assert parent.sd() == pytest.approx(reference.std(), rel=1e-12)


@pytest.mark.parametrize(("text", "reference"), FAMILY_CASES, ids=IDS)
def test_cdf_sf_density_and_quantiles_equal_scipy_into_the_far_tails(text, reference):
    """cdf, sf, pdf, logpdf, ppf and isf agree with scipy.stats to 1e-10 relative, tails included."""
    parent = parse_parent(text)
    probabilities = np.array([1e-12, 1e-9, 1e-6, 0.00135, 0.1, 0.5, 0.9, 0.99865, 1 - 1e-6])
    x = np.concatenate(
        [reference_ppf(reference, probabilities), reference_ppf(reference, probabilities, upper=True)]
    )
    x = x[(reference.pdf(x) > 0) & (x > reference.support()[0]) & (x < reference.support()[1])]
    np.testing.assert_allclose(parent.cdf(x), reference_cdf(reference, x), rtol=1e-10, atol=1e-300)
    np.testing.assert_allclose(parent.sf(x), reference_sf(reference, x), rtol=1e-10, atol=1e-300)
    np.testing.assert_allclose(parent.pdf(x), reference.pdf(x), rtol=1e-10)
    np.testing.assert_allclose(parent.logpdf(x), reference.logpdf(x), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(parent.ppf(probabilities), reference_ppf(reference, probabilities), rtol=1e-9)
    upper = reference_ppf(reference, probabilities, upper=True)
    np.testing.assert_allclose(parent.isf(probabilities), upper, rtol=1e-9)


@pytest.mark.parametrize(("text", "reference"), FAMILY_CASES, ids=IDS)
def test_no_mass_outside_the_support(text, reference):
    """Outside its support a parent has cdf 0 below, sf 0 above and density 0."""
    parent = parse_parent(text)
    low, high = parent.support
    assert (low, high) == pytest.approx(reference.support())
    if math.isfinite(low):
        assert float(parent.cdf(low - 1.0)) == 0.0
        assert float(parent.pdf(low - 1.0)) == 0.0
        assert float(parent.logpdf(low - 1.0)) == -math.inf
    if math.isfinite(high):
        assert float(parent.sf(high + 1.0)) == 0.0
        assert float(parent.pdf(high + 1.0)) == 0.0


def test_a_parent_survives_a_snapshot():
    """to_state gives plain data from which from_state rebuilds an equal parent."""
    for text, _ in FAMILY_CASES:
        parent = parse_parent(text)
        assert Parent.from_state(parent.to_state()) == parent


def test_a_snapshot_of_another_kind_is_refused():
    """from_state refuses a snapshot that is not a parent's."""
    state = parse_parent("normal:mean=1,sd=2").to_state()
    state["kind"] = "chart"
    with pytest.raises(StateError):
        Parent.from_state(state)


# ------------------------------------------------------------------ fitting


def _check_fit(report, family, truth, sample):
    assert report.chosen.name == family, [c.parent.describe() for c in report.candidates]
    assert report.best.name == family
    assert not report.fell_back
    assert 0.01 <= report.p_value <= 1.0
    assert report.candidates[0].parent == report.best
    assert [c.aic for c in report.candidates] == sorted(c.aic for c in report.candidates)
    for key, value in truth.items():
        assert report.chosen.param(key) == pytest.approx(value, rel=0.08), key
    del sample


@pytest.mark.parametrize(
    ("family", "truth", "draw"),
    [
        ("normal", {"mean": 16.0, "sd": 6.0}, lambda rng, n: rng.normal(16.0, 6.0, n)),
        ("lognormal", {"log_mean": 1.0, "log_sd": 0.4}, lambda rng, n: rng.lognormal(1.0, 0.4, n)),
        ("gamma", {"shape": 3.0, "scale": 2.0}, lambda rng, n: rng.gamma(3.0, 2.0, n)),
        ("weibull", {"shape": 2.5, "scale": 10.0}, lambda rng, n: 10.0 * rng.weibull(2.5, n)),
    ],
)
def test_fit_parent_finds_the_family_a_large_sample_came_from(family, truth, draw):
    """On 3000 seeded readings fit_parent chooses the true family by AIC, near the true parameters."""
    sample = draw(np.random.default_rng(20260), 3000)
    report = fit_parent(sample, bootstrap=99)
    _check_fit(report, family, truth, sample)
    assert "Anderson-Darling" in report.method


def test_the_anderson_darling_statistic_equals_scipys_goodness_of_fit():
    """The statistic of the chosen family equals scipy.stats.goodness_of_fit's at the same parameters."""
    rng = np.random.default_rng(11)
    sample = rng.normal(16.0, 6.0, 400)
    report = fit_parent(sample, candidates=("normal",), bootstrap=99)
    known = {"loc": report.chosen.param("mean"), "scale": report.chosen.param("sd")}
    reference = stats.goodness_of_fit(
        stats.norm, sample, known_params=known, statistic="ad", n_mc_samples=19, rng=1
    )
    assert report.anderson_darling == pytest.approx(reference.statistic, rel=1e-12)
    gamma_sample = rng.gamma(3.0, 2.0, 400)
    gamma = fit_parent(gamma_sample, candidates=("gamma",), bootstrap=99).chosen
    known = {"a": gamma.param("shape"), "loc": 0.0, "scale": gamma.param("scale")}
    gamma_reference = stats.goodness_of_fit(
        stats.gamma, gamma_sample, known_params=known, statistic="ad", n_mc_samples=19, rng=1
    )
    assert fit_parent(gamma_sample, candidates=("gamma",), bootstrap=99).anderson_darling == pytest.approx(
        gamma_reference.statistic, rel=1e-12
    )
    # the maximum-likelihood gamma: scipy's own fit lands on the same parameters
    shape, _, scale = stats.gamma.fit(gamma_sample, floc=0.0)
    assert (gamma.param("shape"), gamma.param("scale")) == pytest.approx((shape, scale), rel=1e-4)


def test_the_bootstrap_p_value_agrees_with_scipys_monte_carlo_p_value():
    """Both re-fit every simulated sample; with 399 samples each they agree within their sampling error."""
    sample = np.random.default_rng(5).gamma(3.0, 2.0, 300)
    ours = fit_parent(sample, candidates=("gamma",), bootstrap=399, seed=3).p_value
    theirs = stats.goodness_of_fit(
        stats.gamma, sample, known_params={"loc": 0.0}, statistic="ad", n_mc_samples=399, rng=4
    ).pvalue
    spread = math.sqrt(2.0 * max(ours * (1 - ours), 0.01) / 399)
    assert abs(ours - theirs) < 5.0 * spread


def test_a_sample_no_family_fits_falls_back_to_the_empirical_parent():
    """Two well separated modes: every candidate fails the goodness-of-fit test, the empirical parent is chosen."""
    rng = np.random.default_rng(8)
    sample = np.concatenate([rng.normal(10.0, 1.0, 600), rng.normal(20.0, 1.0, 600)])
    report = fit_parent(sample, bootstrap=99)
    assert report.fell_back
    assert report.p_value <= 0.01
    assert report.chosen.name == "empirical"
    assert report.best.name in ("normal", "lognormal", "gamma", "weibull")


def test_families_that_need_positive_readings_are_skipped_with_a_reason():
    """Readings at or below zero leave only the normal among the default candidates, and say why."""
    sample = np.random.default_rng(2).normal(0.0, 1.0, 200)
    report = fit_parent(sample, bootstrap=99)
    assert {c.parent.name for c in report.candidates} == {"normal"}
    assert dict(report.skipped)["lognormal"] == "needs positive readings"


@pytest.mark.parametrize(
    ("kwargs", "words"),
    [
        ({"candidates": ()}, "at least one"),
        ({"candidates": ("beta",)}, "cannot fit 'beta'"),
        ({"alpha": 1.5}, "alpha must be"),
        ({"bootstrap": 5}, "bootstrap must be an integer of at least 19"),
    ],
)
def test_fit_parent_refuses_bad_options(kwargs, words):
    """Bad options raise ConfigError with a clear message."""
    with pytest.raises(ConfigError, match=words):
        fit_parent(np.arange(1.0, 50.0), **kwargs)


# ------------------------------------------------------------------ empirical parents


@pytest.fixture(scope="module")
def baseline():
    return np.random.default_rng(4).gamma(4.0, 4.0, 500)


@pytest.fixture(scope="module")
def model(baseline):
    return empirical(baseline)


def test_the_bandwidth_is_silvermans_rule_of_thumb(baseline, model):
    """b = 0.9 min(sd, IQR / 1.349) N^(-1/5) (Silverman 1986, eq. 3.31)."""
    sd = np.std(baseline, ddof=1)
    q25, q75 = np.quantile(baseline, [0.25, 0.75])
    expected = 0.9 * min(sd, (q75 - q25) / 1.349) * len(baseline) ** -0.2
    assert model.param("bandwidth") == pytest.approx(expected, rel=1e-12)


def test_the_empirical_parent_is_a_proper_distribution(model):
    """cdf + sf = 1, cdf increases from 0 to 1 over the support, density integrates to the cdf."""
    low, high = model.support
    x = np.linspace(low - 1.0, high + 1.0, 20001)
    cdf, sf = model.cdf(x), model.sf(x)
    np.testing.assert_allclose(cdf + sf, 1.0, atol=1e-12)
    assert np.all(np.diff(cdf) >= -1e-15)
    assert cdf[0] == 0.0
    assert sf[-1] == 0.0
    # trapezoid integral of the density against the cdf, on the same fine grid
    integral = np.concatenate([[0.0], np.cumsum(np.diff(x) * 0.5 * (model.pdf(x)[1:] + model.pdf(x)[:-1]))])
    np.testing.assert_allclose(integral, cdf, atol=2e-6)


def test_the_empirical_parent_keeps_the_sample_mean_and_variance(baseline, model):
    """The mean and variance stay near the sample's (smoothing and the fitted tails change them a little)."""
    assert model.mean() == pytest.approx(np.mean(baseline), rel=0.01)
    assert model.sd() ** 2 == pytest.approx(np.var(baseline), rel=0.05)


def test_the_empirical_quantiles_invert_its_cdf_in_both_tails(model):
    """ppf(cdf(x)) = x and isf(sf(x)) = x from 1e-12 to the median."""
    q = np.array([1e-12, 1e-8, 1e-4, 0.01, 0.3, 0.5])
    np.testing.assert_allclose(model.cdf(model.ppf(q)), q, rtol=1e-8)
    np.testing.assert_allclose(model.sf(model.isf(q)), q, rtol=1e-8)


def test_beyond_its_thresholds_the_empirical_parent_holds_k_over_n_of_the_mass(baseline, model):
    """Each tail beyond the k-th most extreme reading holds about k/N, k = max(5, ceil(sqrt N)).

    The lattice holds exactly k/N beyond each threshold (the model's notes); the spline that
    smooths it moves a little mass across the threshold, within a few lattice steps.
    """
    n = len(baseline)
    k = max(5, math.ceil(math.sqrt(n)))
    lower, upper = model.param("lower_threshold"), model.param("upper_threshold")
    step = model.param("step")
    assert float(model.sf(upper + 2.0 * step)) < k / n < float(model.sf(upper - 2.0 * step))
    assert float(model.cdf(lower - 2.0 * step)) < k / n < float(model.cdf(lower + 2.0 * step))


def test_an_empirical_parent_of_normal_readings_is_close_to_the_normal(model):
    """From 5000 normal readings the model's cdf is within a Kolmogorov band of the true law."""
    sample = np.random.default_rng(9).normal(16.0, 6.0, 5000)
    fitted = empirical(sample)
    x = np.linspace(-10.0, 42.0, 521)
    # the sample's own distance is below 1.63 / sqrt(N) with probability 0.99 (Kolmogorov)
    assert np.max(np.abs(fitted.cdf(x) - stats.norm(16.0, 6.0).cdf(x))) < 1.63 / math.sqrt(5000)
    del model


def test_empirical_parents_compare_and_hash_by_content_and_survive_a_snapshot(baseline, model):
    """The same sample gives an equal parent; a snapshot round trip too; another sample does not."""
    assert empirical(baseline) == model
    assert hash(empirical(baseline)) == hash(model)
    restored = Parent.from_state(model.to_state())
    assert restored == model
    x = np.linspace(-10.0, 60.0, 71)
    np.testing.assert_array_equal(restored.cdf(x), model.cdf(x))
    assert empirical(baseline[:-1]) != model


def test_empirical_refuses_too_few_equal_or_missing_readings():
    """Fewer than 20 readings, all equal, or a non-finite reading: a clear error."""
    with pytest.raises(NotEnoughData):
        empirical(np.arange(10.0))
    with pytest.raises(ConfigError, match="all readings are equal"):
        empirical(np.full(50, 3.0))
    with pytest.raises(ConfigError, match="not a finite number"):
        empirical(np.concatenate([np.arange(30.0), [np.nan]]))
