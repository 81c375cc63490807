"""Laws of chart statistics under parent models, against independent computations.

Witnesses, named beside each check:

* closed forms in scipy.stats (a reference library): normal, gamma (and exponential), chi
  (the sd of normal readings), beta (the range of uniform readings), studentized range with
  infinite degrees of freedom (the range of normal readings);
* exact formulas evaluated exactly or with mpmath at high precision:
  - Irwin-Hall: ``F(u) = (1/m!) sum_(k <= u) (-1)^k C(m, k) (u - k)^m`` for the sum of m
    uniforms (the mean of uniform readings is its scaled form, the Bates law; a symmetric
    triangular reading is the mean of two uniforms), with mpmath at 120 digits;
  - a sum of triangular readings: the triangular density's second derivative is three point
    masses, so its Laplace transform is ``(A e^(-as) - (A + B) e^(-cs) + B e^(-bs)) / s^2``
    with ``A = 2 / ((b - a)(c - a))``, ``B = 2 / ((b - a)(b - c))``; expanding the n-th power
    gives the law of the sum as a sum of truncated powers ``(x - d)_+^(2n) / (2n)!``,
    evaluated in exact rational arithmetic (fractions) for rational corners;
  - sums of differently scaled uniforms (the EWMA of uniform readings) the same way, from
    ``prod_j (e^(-s lo_j) - e^(-s hi_j)) / (s w_j)``;
  - the mean of two lognormal or Weibull readings: ``P(X + Y > s) = S(s/2)^2 + 2 int_0^(s/2)
    f(x) S(s - x) dx`` (and the matching form for the lower tail), an independent numerical
    convolution by QUADPACK (scipy.integrate.quad) over log x;
  - the range of n readings, ``P(R <= r) = n int f(x) (F(x + r) - F(x))^(n - 1) dx``, by mpmath
    quadrature at 40 digits (for the normal and the exponential);
  - the empirical parent's mean: its lattice weights convolved exactly (a direct convolution of
    non-negative numbers keeps relative precision) and the Irwin-Hall law of its 4n spline
    uniforms with mpmath;
* the Markov chain of :func:`monitor.spc.arl.ewma_tail` (another module, another method) for
  the steady-state EWMA;
* a seeded Monte Carlo as a third witness for every numerical law: a simulated frequency must
  lie within five binomial standard errors (plus the law's stated error bound) of the law's
  probability. With about 150 such checks the chance of any false failure is below 1e-4.

Facts of the trade are marked "common practice, no source". Seeds are fixed; none was chosen to
make a check pass. Laws that take a while to build are built once per module (fixtures).
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest
from scipy import integrate, special, stats

from monitor.spc import (
    CusumChart,
    EwmaChart,
    IndividualsChart,
    PChart,
    Rule,
    Subgroup,
    XbarRChart,
    XbarSChart,
    nelson,
    p_value,
    pattern_probability,
)
from monitor.spc.arl import ewma_tail, shewhart_arl
from monitor.spc.constants import range_cdf
from monitor.spc.errors import ConfigError
from monitor.spc.laws import (
    CLOSED_FORM,
    CONVOLUTION,
    LawCache,
    SignalPValue,
    law_of_ewma,
    law_of_mean,
    law_of_range,
    law_of_sd,
    probability_limits,
    signal_p_value,
    standardized_mean_cdf,
    true_false_alarm_rate,
)
from monitor.spc.parents import Parent, empirical, parse_parent
from monitor.spc.signals import RuleId, Side
from monitor.spc.types import Statistic

SYMMETRIC = parse_parent("triangular:low=0,mode=16,high=32")
SKEWED = parse_parent("triangular:low=0,mode=6,high=32")
UNIFORM = parse_parent("uniform:low=0,high=32")
NORMAL = parse_parent("normal:mean=16,sd=6")
LOGNORMAL = parse_parent("lognormal:log_mean=0,log_sd=0.5")
HEAVY = parse_parent("lognormal:log_mean=0,log_sd=1")
WEIBULL = parse_parent("weibull:shape=1.5,scale=10")
SPIKY = parse_parent("weibull:shape=0.7,scale=2")
TAILS = (0.5, 0.1, 1e-3, 1e-6, 1e-9, 1e-12, 1e-20, 1e-30)


# ------------------------------------------------------------------ witnesses


def irwin_hall(m: int, u: float) -> tuple[mpmath.mpf, mpmath.mpf]:
    """(P(U <= u), P(U > u)) for U the sum of m uniforms on [0, 1], at 120 digits."""
    with mpmath.workdps(120):
        v = mpmath.mpf(u)
        if v <= 0:
            return mpmath.mpf(0), mpmath.mpf(1)
        if v >= m:
            return mpmath.mpf(1), mpmath.mpf(0)
        side = v if v <= m / 2 else m - v
        total = mpmath.fsum(
            (-1) ** k * mpmath.binomial(m, k) * (side - k) ** m for k in range(int(mpmath.floor(side)) + 1)
        )
        small = total / mpmath.factorial(m)
        return (small, 1 - small) if v <= m / 2 else (1 - small, small)


def bates(m: int, x: float, width: float) -> tuple[float, float]:
    """(P(M <= x), P(M > x)) for M the mean of m uniforms on [0, width], at the float x exactly."""
    with mpmath.workdps(120):
        below, above = irwin_hall(m, mpmath.mpf(x) * m / mpmath.mpf(width))
        return float(below), float(above)


def triangular_sum(a: int, c: int, b: int, n: int, s: Fraction) -> tuple[Fraction, Fraction]:
    """(P(S <= s), P(S > s)) for S the sum of n triangular(a, c, b) readings, exactly."""
    big_a = Fraction(2, (b - a) * (c - a))
    big_b = Fraction(2, (b - a) * (b - c))
    corners = ((big_a, a), (-(big_a + big_b), c), (big_b, b))
    total = Fraction(0)
    for i in range(n + 1):
        for j in range(n - i + 1):
            k = n - i - j
            d = i * a + j * c + k * b
            if s <= d:
                continue
            count = Fraction(math.factorial(n), math.factorial(i) * math.factorial(j) * math.factorial(k))
            total += count * corners[0][0] ** i * corners[1][0] ** j * corners[2][0] ** k * (s - d) ** (2 * n)
    cdf = total / math.factorial(2 * n)
    return cdf, 1 - cdf


def uniform_sum(widths: list[tuple[Fraction, Fraction]], s: Fraction) -> tuple[Fraction, Fraction]:
    """(P(S <= s), P(S > s)) for S a sum of independent uniforms on [lo_j, hi_j], exactly."""
    m = len(widths)
    scale = Fraction(1)
    for lo, hi in widths:
        scale /= hi - lo
    total = Fraction(0)
    for mask in range(1 << m):
        d = Fraction(0)
        sign = 1
        for j, (lo, hi) in enumerate(widths):
            if mask >> j & 1:
                d += hi
                sign = -sign
            else:
                d += lo
        if s > d:
            total += sign * (s - d) ** m
    cdf = total * scale / math.factorial(m)
    return cdf, 1 - cdf


def pair_tail(parent: Parent, s: float, *, upper: bool) -> float:
    """P(X + Y > s) (upper) or P(X + Y <= s) for two lognormal or Weibull readings.

    ``S(s/2)^2 + 2 int_0^(s/2) f(x) S(s - x) dx`` (or ``2 int f(x) F(s - x) dx - F(s/2)^2``),
    integrated over u = log x, where the density of log X is smooth (normal, or Gumbel for the
    Weibull), by QUADPACK's adaptive Gauss-Kronrod rule (scipy.integrate.quad) at 1e-13
    relative, on pieces split at the body of log X and geometrically below log(s/2).
    """
    p = dict(parent.params)
    if parent.name == "lognormal":
        mu, sg = p["log_mean"], p["log_sd"]

        def log_density(u: float) -> float:
            return math.exp(-0.5 * ((u - mu) / sg) ** 2) / (sg * math.sqrt(2.0 * math.pi))

        def tail(x: float) -> float:
            if x <= 0:
                return 1.0 if upper else 0.0
            z = (math.log(x) - mu) / sg
            return float(special.ndtr(-z if upper else z))

        center, spread = mu, sg
    else:
        k, lam = p["shape"], p["scale"]

        def log_density(u: float) -> float:
            w = math.exp(k * (u - math.log(lam)))
            return k * w * math.exp(-w)

        def tail(x: float) -> float:
            if x <= 0:
                return 1.0 if upper else 0.0
            w = (x / lam) ** k
            return math.exp(-w) if upper else -math.expm1(-w)

        center, spread = math.log(lam), 1.0 / k
    top = math.log(s / 2.0)
    breaks = {top - d for d in (0.05, 0.2, 0.5, 2.0, 8.0)} | {center + j * spread for j in range(-12, 13, 3)}
    edges = [min(center - 40.0 * spread, top - 40.0), *sorted(b for b in breaks if b < top), top]
    inside = 0.0
    for a, b in itertools.pairwise(edges):
        value, _ = integrate.quad(
            lambda u: log_density(u) * tail(s - math.exp(u)), a, b, epsabs=0.0, epsrel=1e-13, limit=200
        )
        inside += value
    half = tail(s / 2.0)
    return half**2 + 2.0 * inside if upper else 2.0 * inside - half**2


def lattice_mean_tail(parent: Parent, n: int, y: float, upper: bool, weights: np.ndarray) -> float:
    """P(mean > y) (or < y) for the empirical parent: exact lattice sum and mpmath Irwin-Hall."""
    grid = parent.grid
    assert grid is not None
    # n y = n origin + step (K + U), K the lattice sum, U the sum of 4n uniforms on [-1/2, 1/2]
    z = n * (y - grid.origin) / grid.step
    lo, hi = math.ceil(z - 2 * n), math.floor(z + 2 * n)
    with mpmath.workdps(120):
        if upper:
            total = (
                mpmath.mpf(float(weights[max(hi + 1, 0) :].sum())) if hi + 1 < len(weights) else mpmath.mpf(0)
            )
        else:
            total = mpmath.mpf(float(weights[: max(lo, 0)].sum()))
        for k in range(max(lo, 0), min(hi, len(weights) - 1) + 1):
            below, above = irwin_hall(4 * n, z - k + 2 * n)
            total += mpmath.mpf(float(weights[k])) * (above if upper else below)
        return float(total)


def lattice_power(weights: np.ndarray, n: int) -> np.ndarray:
    """The n-fold convolution of non-negative weights (direct sums: relative precision kept)."""
    out, base, k = np.array([1.0]), weights.copy(), n
    while k:
        if k & 1:
            out = np.convolve(out, base)
        k >>= 1
        if k:
            base = np.convolve(base, base)
    return out


def assert_tail(law, x: float, reference: float, *, upper: bool) -> None:
    """The law's tail at x equals the reference within its stated error bound and relative error.

    Both the vectorised (sf/cdf) and the fast scalar (tail) paths are checked.
    """
    got = float(law.sf(x)) if upper else float(law.cdf(x))
    fast = law.tail(x, upper=upper)
    bound = law.error_bound
    assert bound is not None
    assert abs(got - reference) <= bound + 1e-15 * reference, (x, got, reference, bound)
    assert abs(fast - reference) <= bound + 1e-15 * reference, (x, fast, reference, bound)
    relative = getattr(law, "relative_error", 1e-13) or 1e-13
    if reference > max(getattr(law, "tail_floor", 0.0), 1e-300):
        assert abs(got / reference - 1.0) <= relative, (x, got, reference, relative)
        assert abs(fast / reference - 1.0) <= relative, (x, fast, reference, relative)


def monte_carlo_agrees(law, sample: np.ndarray, probabilities=(0.5, 0.1, 0.01, 0.001)) -> None:
    """Simulated frequencies beyond the law's quantiles lie within 5 binomial standard errors."""
    size = sample.shape[0]
    for p in probabilities:
        for upper in (True, False):
            x = float(law.isf(p)) if upper else float(law.ppf(p))
            expected = law.tail(x, upper=upper)
            seen = float(np.mean(sample > x)) if upper else float(np.mean(sample < x))
            spread = 5.0 * math.sqrt(expected * (1.0 - expected) / size) + (law.error_bound or 0.0)
            assert abs(seen - expected) <= spread, (p, upper, x, seen, expected, spread)


def draws(parent: Parent, size: int, seed: int) -> np.ndarray:
    """Seeded readings from a parent by inversion (exact quantile functions)."""
    return parent.ppf(np.random.default_rng(seed).random(size))


# ------------------------------------------------------------------ facts of the trade


def test_one_reading_of_18_or_more_under_three_models_of_a_process_centred_at_16():
    """Mean 16: P(X >= 18) is about 0.37 (normal, sd 6), 0.38 (triangular on [0, 32]), 0.44 (uniform).

    Common practice, no source; the exact values are 0.3694, 196/512 and 14/32.
    """
    assert round(law_of_mean(NORMAL, 1).tail(18.0, upper=True), 2) == 0.37
    assert round(law_of_mean(SYMMETRIC, 1).tail(18.0, upper=True), 2) == 0.38
    assert round(law_of_mean(UNIFORM, 1).tail(18.0, upper=True), 2) == 0.44
    assert law_of_mean(SYMMETRIC, 1).tail(18.0, upper=True) == pytest.approx(196 / 512, rel=1e-14)
    assert law_of_mean(UNIFORM, 1).tail(18.0, upper=True) == pytest.approx(14 / 32, rel=1e-14)


def test_a_mean_of_25_normal_readings_of_18_or_more_has_probability_about_5_percent():
    """P(mean of 25 >= 18) with mean 16, sd 6 is about 0.05 (common practice, no source): 1 - Phi(5/3)."""
    tail = law_of_mean(NORMAL, 25).tail(18.0, upper=True)
    assert round(tail, 2) == 0.05
    assert tail == pytest.approx(stats.norm.sf(2.0 / (6.0 / 5.0)), rel=1e-14)


# ------------------------------------------------------------------ closed forms against scipy


@pytest.mark.parametrize("n", [1, 4, 25])
def test_the_mean_of_normal_readings_is_scipys_normal(n):
    """The law of the mean of n normal readings is normal(mean, sd / sqrt n), to the far tails (scipy)."""
    law = law_of_mean(NORMAL, n)
    reference = stats.norm(16.0, 6.0 / math.sqrt(n))
    assert law.method == CLOSED_FORM
    for p in TAILS:
        for upper in (True, False):
            x = float(reference.isf(p) if upper else reference.ppf(p))
            assert_tail(law, x, p, upper=upper)
        assert float(law.isf(p)) == pytest.approx(reference.isf(p), rel=1e-13)
        assert float(law.ppf(p)) == pytest.approx(reference.ppf(p), rel=1e-13)


@pytest.mark.parametrize(
    ("text", "shape", "scale"),
    [
        ("gamma:shape=2.5,scale=3", 2.5, 3.0),
        ("exponential:mean=4", 1.0, 4.0),
        ("weibull:shape=1,scale=2", 1.0, 2.0),
    ],
)
def test_the_mean_of_gamma_readings_is_scipys_gamma(text, shape, scale):
    """The mean of n gamma(k, theta) readings is gamma(n k, theta / n) (scipy), tails included."""
    for n in (1, 5, 25):
        law = law_of_mean(parse_parent(text), n)
        reference = stats.gamma(n * shape, scale=scale / n)
        assert law.method == CLOSED_FORM
        for p in TAILS:
            assert_tail(law, float(reference.isf(p)), p, upper=True)
            assert_tail(law, float(reference.ppf(p)), p, upper=False)


@pytest.mark.parametrize("n", [2, 3, 5, 10, 25])
def test_the_sd_of_normal_readings_is_scipys_chi_law(n):
    """S of n normal readings is sigma chi(n - 1) / sqrt(n - 1) (scipy.stats.chi), tails included."""
    law = law_of_sd(NORMAL, n)
    reference = stats.chi(n - 1, scale=6.0 / math.sqrt(n - 1))
    for p in TAILS[:6]:
        assert_tail(law, float(reference.isf(p)), p, upper=True)
        assert_tail(law, float(reference.ppf(p)), p, upper=False)
    assert float(law.isf(0.00135)) == pytest.approx(reference.isf(0.00135), rel=1e-12)


@pytest.mark.parametrize("n", [1, 2, 5, 25, 50])
def test_the_mean_of_uniform_readings_is_the_irwin_hall_law(n):
    """Bates law of n uniforms on [0, 32] against Irwin-Hall at 120 digits, down to 1e-30."""
    law = law_of_mean(UNIFORM, n)
    assert law.method == CLOSED_FORM
    for u in [*np.linspace(0.01, n / 2, 12).tolist(), 0.001 * n, 0.05, 0.3]:
        for x in (32.0 * u / n, 32.0 - 32.0 * u / n):
            below, above = bates(n, x, 32.0)
            assert_tail(law, x, below, upper=False)
            assert_tail(law, x, above, upper=True)


@pytest.mark.parametrize("n", [1, 5, 25])
def test_the_mean_of_symmetric_triangular_readings_is_the_irwin_hall_law_of_2n_uniforms(n):
    """A symmetric triangular reading is the mean of two uniforms: the Irwin-Hall law of 2n (mpmath)."""
    law = law_of_mean(SYMMETRIC, n)
    assert law.method == CLOSED_FORM
    m = 2 * n
    for target in (0.3, 1e-3, 1e-6, 1e-9, 1e-12, 1e-20):
        # the point where the Irwin-Hall lower tail is about `target`, by bisection on the witness
        lo, hi = 0.0, m / 2
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if irwin_hall(m, mid)[0] < target else (lo, mid)
        for x in (32.0 * lo / m, 32.0 - 32.0 * lo / m):
            below, above = bates(m, x, 32.0)
            assert_tail(law, x, below, upper=False)
            assert_tail(law, x, above, upper=True)
    assert getattr(law, "relative_error", 0.0) < 1e-9


# ------------------------------------------------------------------ convolution laws


@pytest.fixture(scope="module")
def skewed_laws():
    return {n: law_of_mean(SKEWED, n) for n in (2, 5, 25)}


@pytest.mark.parametrize("n", [2, 5, 25])
def test_the_mean_of_skewed_triangular_readings_equals_the_exact_sum_of_truncated_powers(skewed_laws, n):
    """Convolution against the exact law of a sum of triangular(0, 6, 32) readings (fractions)."""
    law = skewed_laws[n]
    assert law.method == CONVOLUTION
    for p in TAILS:
        for upper in (True, False):
            x = float(law.isf(p) if upper else law.ppf(p))
            below, above = triangular_sum(0, 6, 32, n, Fraction(x) * n)
            assert_tail(law, x, float(above if upper else below), upper=upper)


@pytest.mark.parametrize("n", [5, 25])
def test_the_convolution_path_reproduces_the_irwin_hall_law(n):
    """numerical=True for uniform and symmetric triangular parents against Irwin-Hall (mpmath)."""
    for parent, m, width in ((UNIFORM, n, 32.0), (SYMMETRIC, 2 * n, 32.0)):
        law = law_of_mean(parent, n, numerical=True)
        assert law.method == CONVOLUTION
        for u in (0.02 * m, 0.1 * m, 0.25 * m, 0.4 * m, 0.5 * m):
            for x in (width * u / m, width - width * u / m):
                below, above = bates(m, x, width)
                assert_tail(law, x, below, upper=False)
                assert_tail(law, x, above, upper=True)


@pytest.mark.parametrize(
    ("text", "shape", "scale", "n"),
    [
        ("gamma:shape=2,scale=3", 2.0, 3.0, 5),
        ("gamma:shape=0.5,scale=3", 0.5, 3.0, 4),
        ("exponential:mean=2", 1.0, 2.0, 25),
    ],
)
def test_the_convolution_in_x_reproduces_the_gamma_law(text, shape, scale, n):
    """numerical=True for gamma parents (the lognormal and Weibull method) against scipy's gamma."""
    law = law_of_mean(parse_parent(text), n, numerical=True)
    assert law.method == CONVOLUTION
    reference = stats.gamma(n * shape, scale=scale / n)
    for p in TAILS:
        assert_tail(law, float(reference.isf(p)), p, upper=True)
        assert_tail(law, float(reference.ppf(p)), p, upper=False)
    assert law.tail_floor <= 1e-30


@pytest.mark.parametrize("parent", [LOGNORMAL, HEAVY, WEIBULL, SPIKY], ids=lambda p: p.describe())
def test_the_mean_of_two_lognormal_or_weibull_readings_equals_an_independent_quadrature(parent):
    """Mean of 2 against P(X + Y > s) by adaptive quadrature (QUADPACK), tails to 1e-30."""
    law = law_of_mean(parent, 2)
    assert law.method == CONVOLUTION
    for p in (0.5, 0.1, 1e-3, 1e-6, 1e-10, 1e-15, 1e-20, 1e-30):
        for upper in (True, False):
            y = float(law.isf(p) if upper else law.ppf(p))
            assert_tail(law, y, pair_tail(parent, 2.0 * y, upper=upper), upper=upper)


@pytest.fixture(scope="module")
def positive_laws():
    return {(p.describe(), n): law_of_mean(p, n) for p in (LOGNORMAL, WEIBULL, SPIKY) for n in (5, 25)}


@pytest.mark.parametrize("parent", [LOGNORMAL, WEIBULL, SPIKY], ids=lambda p: p.describe())
@pytest.mark.parametrize("n", [5, 25])
def test_means_of_lognormal_and_weibull_readings_agree_with_monte_carlo(positive_laws, parent, n):
    """Seeded Monte Carlo (400 000 subgroups) as a third witness of the convolution laws."""
    law = positive_laws[(parent.describe(), n)]
    sample = draws(parent, 400_000 * n, seed=n).reshape(-1, n).mean(axis=1)
    monte_carlo_agrees(law, sample)
    assert law.tail_floor <= 1e-30
    assert law.relative_error < 1e-6


def test_a_heavy_lognormal_keeps_its_upper_tail_heavy():
    """Far upper tail of the mean of 5 lognormal(0, 1): at least the one-big-reading bound P(X > 5y)."""
    law = law_of_mean(HEAVY, 5)
    for y in (10.0, 30.0, 100.0, 300.0):
        one_big = float(HEAVY.sf(5.0 * y))
        # P(mean > y) >= P(one reading > 5 y) and <= 5 P(one reading > y)
        assert one_big <= law.tail(y, upper=True) <= 5.0 * float(HEAVY.sf(y))


@pytest.fixture(scope="module")
def baseline_parent():
    return empirical(np.random.default_rng(4).gamma(4.0, 4.0, 500))


@pytest.mark.parametrize("n", [5, 25])
def test_the_mean_of_empirical_readings_equals_the_exact_lattice_law(baseline_parent, n):
    """Empirical parent: the exact lattice convolution with the Irwin-Hall law of the spline (mpmath)."""
    law = law_of_mean(baseline_parent, n)
    assert law.method == CONVOLUTION
    weights = lattice_power(np.asarray(baseline_parent.grid.weights), n)
    sd = baseline_parent.sd() / math.sqrt(n)
    steps = (-9, -5, -3, 0, 3, 5, 9, 12) if n == 5 else (-7, -3, 0, 3, 7, 12)
    for z in steps:
        y = baseline_parent.mean() + z * sd
        for upper in (True, False):
            reference = lattice_mean_tail(baseline_parent, n, y, upper, weights)
            assert_tail(law, y, reference, upper=upper)


def test_the_mean_of_empirical_readings_agrees_with_monte_carlo(baseline_parent):
    """Seeded Monte Carlo of the empirical model itself (drawn by inversion) as a third witness."""
    law = law_of_mean(baseline_parent, 5)
    sample = draws(baseline_parent, 1_000_000, seed=7).reshape(-1, 5).mean(axis=1)
    monte_carlo_agrees(law, sample)


def test_the_mean_of_skewed_triangular_readings_agrees_with_monte_carlo(skewed_laws):
    """Seeded Monte Carlo as a third witness for the skewed triangular convolution."""
    sample = draws(SKEWED, 2_000_000, seed=3).reshape(-1, 5).mean(axis=1)
    monte_carlo_agrees(skewed_laws[5], sample)


# ------------------------------------------------------------------ ranges and sds


def _range_witness(parent_pdf, parent_cdf, n: int, r: float, low, high) -> tuple[float, float]:
    """(P(R <= r), P(R > r)) by mpmath quadrature of n int f(x) (F(x + r) - F(x))^(n-1) dx."""
    with mpmath.workdps(40):
        rr = mpmath.mpf(r)
        inside = mpmath.quad(
            lambda x: parent_pdf(x) * (parent_cdf(x + rr) - parent_cdf(x)) ** (n - 1), [low, 0, high]
        )
        cdf = n * inside
        return float(cdf), float(1 - cdf)


@pytest.mark.parametrize("n", [2, 5, 10])
def test_the_range_of_normal_readings_matches_scipy_and_the_project_constants(n):
    """Range of n normal readings: scipy's studentized range (df = inf), range_cdf, and mpmath far out."""
    law = law_of_range(parse_parent("normal:mean=0,sd=1"), n)
    for w in (0.5, 1.0, 2.0, 3.0, 4.0, 5.0):
        reference = stats.studentized_range.cdf(w, n, np.inf)
        assert float(law.cdf(w)) == pytest.approx(reference, abs=1e-9)
        assert float(law.cdf(w)) == pytest.approx(range_cdf(w, n), abs=1e-12)
    # far upper tail, where scipy's studentized range has no relative precision: mpmath
    if n == 5:
        with mpmath.workdps(40):
            _below, above = _range_witness(mpmath.npdf, mpmath.ncdf, n, 7.5, -mpmath.inf, mpmath.inf)
        assert_tail(law, 7.5, above, upper=True)


@pytest.mark.parametrize("n", [2, 4, 8])
def test_the_range_of_uniform_and_exponential_readings_has_its_closed_forms(n):
    """Uniform: R / width is beta(n - 1, 2) (scipy); exponential: P(R <= r) = (1 - e^-r)^(n-1) (mpmath)."""
    law = law_of_range(UNIFORM, n)
    reference = stats.beta(n - 1, 2, scale=32.0)
    for p in TAILS[:6]:
        high, low = float(reference.isf(p)), float(reference.ppf(p))
        assert_tail(law, high, float(reference.sf(high)), upper=True)
        assert_tail(law, low, float(reference.cdf(low)), upper=False)
    law = law_of_range(parse_parent("exponential:mean=1"), n)

    def pdf(x):
        return mpmath.exp(-x) if x >= 0 else mpmath.mpf(0)

    def cdf(x):
        return -mpmath.expm1(-x) if x >= 0 else mpmath.mpf(0)

    for r in (0.05, 0.5, 2.0, 8.0, 20.0):
        with mpmath.workdps(40):
            rr = mpmath.mpf(r)
            below = n * mpmath.quad(
                lambda x, rr=rr: pdf(x) * (cdf(x + rr) - cdf(x)) ** (n - 1), [0, 1, 10, mpmath.inf]
            )
            above = 1 - below
        assert_tail(law, r, float(below), upper=False)
        assert_tail(law, r, float(above), upper=True)


@pytest.fixture(scope="module")
def spread_laws():
    return {
        "range skewed": law_of_range(SKEWED, 5),
        "range lognormal": law_of_range(LOGNORMAL, 5),
        "sd skewed": law_of_sd(SKEWED, 5),
        "sd lognormal": law_of_sd(LOGNORMAL, 4),
        "sd 2 skewed": law_of_sd(SKEWED, 2),
    }


@pytest.mark.parametrize(
    ("key", "parent", "n"), [("range skewed", SKEWED, 5), ("range lognormal", LOGNORMAL, 5)]
)
def test_numerical_range_laws_agree_with_monte_carlo(spread_laws, key, parent, n):
    """Range by numerical integration against 400 000 seeded subgroups."""
    readings = draws(parent, 400_000 * n, seed=11).reshape(-1, n)
    monte_carlo_agrees(spread_laws[key], np.ptp(readings, axis=1))


def test_the_range_of_triangular_readings_equals_mpmath_quadrature(spread_laws):
    """Range of 5 triangular(0, 6, 32) readings against the range integral with mpmath at 40 digits."""
    law = spread_laws["range skewed"]
    a, c, b = 0, 6, 32

    def pdf(x):
        if x <= a or x >= b:
            return mpmath.mpf(0)
        return 2 * (x - a) / ((b - a) * (c - a)) if x < c else 2 * (b - x) / ((b - a) * (b - c))

    def cdf(x):
        if x <= a:
            return mpmath.mpf(0)
        if x >= b:
            return mpmath.mpf(1)
        return (
            (x - a) ** 2 / mpmath.mpf((b - a) * (c - a))
            if x < c
            else 1 - (b - x) ** 2 / mpmath.mpf((b - a) * (b - c))
        )

    for r in (2.0, 8.0, 15.0, 25.0, 30.0):
        with mpmath.workdps(40):
            rr = mpmath.mpf(r)
            edges = sorted({float(a), float(c), float(b), max(float(a), c - r), max(float(a), b - r)})
            below = 5 * mpmath.quad(lambda x, rr=rr: pdf(x) * (cdf(x + rr) - cdf(x)) ** 4, edges)
        assert_tail(law, r, float(below), upper=False)
        assert_tail(law, r, float(1 - below), upper=True)


@pytest.mark.parametrize(
    ("key", "parent", "n"),
    [("sd skewed", SKEWED, 5), ("sd lognormal", LOGNORMAL, 4), ("sd 2 skewed", SKEWED, 2)],
)
def test_sd_laws_agree_with_monte_carlo(spread_laws, key, parent, n):
    """The sd law (quasi-Monte Carlo, or the range over sqrt 2 for n = 2) against plain seeded simulation."""
    law = spread_laws[key]
    readings = draws(parent, 400_000 * n, seed=13).reshape(-1, n)
    monte_carlo_agrees(law, np.std(readings, axis=1, ddof=1), probabilities=(0.5, 0.1, 0.01))


def _small_spread_tail(n: int, s: float, pdf, edges) -> float:
    """Leading term of P(S <= s) as s -> 0: sqrt(n) int f^n times the volume of the ball of
    radius sqrt(n - 1) s in the n - 1 dimensions of deviations (mpmath, 30 digits)."""
    d = n - 1
    with mpmath.workdps(30):
        integral = mpmath.quad(lambda x: pdf(x) ** n, edges)
        ball = (
            mpmath.pi ** (mpmath.mpf(d) / 2) / mpmath.gamma(mpmath.mpf(d) / 2 + 1) * (mpmath.sqrt(d) * s) ** d
        )
        return float(mpmath.sqrt(n) * integral * ball)


def _triangular_0_6_32(x):
    if x <= 0 or x >= 32:
        return mpmath.mpf(0)
    return 2 * mpmath.mpf(x) / (32 * 6) if x < 6 else 2 * (32 - mpmath.mpf(x)) / (32 * 26)


def _lognormal_0_half(x):
    return mpmath.npdf(mpmath.log(x), 0, 0.5) / x if x > 0 else mpmath.mpf(0)


@pytest.mark.parametrize(
    ("key", "n", "pdf", "edges"),
    [
        ("sd skewed", 5, _triangular_0_6_32, [0, 6, 32]),
        ("sd lognormal", 4, _lognormal_0_half, [0, 0.5, 1, 2, 5, mpmath.inf]),
    ],
)
def test_sd_laws_reach_far_lower_tails_with_the_small_spread_law(spread_laws, key, n, pdf, edges):
    """Far lower tails (1e-11 to 1e-6) against the leading term of the law near zero.

    With all n readings within a small spread the density is about f(mean)^n over a ball of
    deviations, so ``P(S <= s) ~ sqrt(n) (int f^n) V_(n-1)(sqrt(n - 1) s)`` (derived here, no
    source; the next term is smaller by a factor of order s / sd, below 3 % at these s).
    """
    law = spread_laws[key]
    parent = SKEWED if key == "sd skewed" else LOGNORMAL
    for z in (0.002, 0.005, 0.01, 0.03):
        s = z * parent.sd()
        reference = _small_spread_tail(n, s, pdf, edges)
        assert s >= law.table.x[0]  # tabulated there, not extrapolated
        assert float(law.cdf(s)) == pytest.approx(reference, rel=0.1)


def test_the_sd_of_three_lognormal_readings_reaches_far_upper_tails():
    """P(S > s) down to 4e-6 against the same probability by adaptive 2-D quadrature.

    The first two readings are integrated by QUADPACK (scipy.integrate.dblquad) in logit(F),
    the third exactly: an independent method for the same integral (the law samples the first
    two). Tolerance: the law's 10 % (three standard errors).
    """
    parent = LOGNORMAL
    law = law_of_sd(parent, 3)
    sd = parent.sd()

    def x_of(t: float) -> float:
        return float(parent.ppf(special.expit(t))) if t < 0 else float(parent.isf(special.expit(-t)))

    def beyond(s: float) -> float:
        def inner(t2: float, t1: float) -> float:
            x1, x2 = x_of(t1), x_of(t2)
            gap = 2.0 * s * s - 0.5 * (x1 - x2) ** 2
            if gap <= 0:
                value = 1.0
            else:
                d = math.sqrt(1.5 * gap)
                m = 0.5 * (x1 + x2)
                value = float(parent.cdf(m - d) + parent.sf(m + d))
            return value * special.expit(t1) * special.expit(-t1) * special.expit(t2) * special.expit(-t2)

        return integrate.dblquad(inner, -40, 40, -40, 40, epsabs=0, epsrel=1e-5)[0]

    for z in (4.0, 6.0, 9.0):
        reference = beyond(z * sd)
        assert z * sd <= law.table.x[-1]  # tabulated there, not extrapolated
        assert float(law.sf(z * sd)) == pytest.approx(reference, rel=0.1)


# ------------------------------------------------------------------ EWMA


def test_the_ewma_of_normal_readings_is_normal_with_its_exact_variance():
    """Normal: sd = sigma sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2t)) / n) (scipy normal)."""
    for t in (1, 3, None):
        law = law_of_ewma(NORMAL, 4, 0.2, t=t)
        factor = 1.0 - 0.8 ** (2 * t) if t is not None else 1.0
        reference = stats.norm(16.0, 6.0 * math.sqrt(0.2 / 1.8 * factor / 4))
        for p in TAILS[:6]:
            assert_tail(law, float(reference.isf(p)), p, upper=True)


def test_a_first_ewma_point_is_an_affine_image_of_the_mean():
    """After one subgroup E = (1 - lambda) start + lambda mean: the same law as the mean's (two methods)."""
    for parent in (SKEWED, LOGNORMAL):
        mean = law_of_mean(parent, 5)
        start = parent.mean()
        first = law_of_ewma(parent, 5, 0.25, t=1, start=start)
        for p in (0.1, 1e-3, 1e-6, 1e-9):
            x = float(mean.isf(p))
            assert first.tail(0.75 * start + 0.25 * x, upper=True) == pytest.approx(p, rel=1e-6)


def test_the_ewma_of_uniform_readings_equals_the_exact_law_of_a_sum_of_scaled_uniforms():
    """Two subgroups of two uniform readings, lambda = 1/4: a sum of four scaled uniforms (fractions)."""
    law = law_of_ewma(UNIFORM, 2, 0.25, t=2, start=16.0)
    # E = (3/4)^2 16 + (1/4)(3/4) mean_1 + (1/4) mean_2, each mean the average of two uniforms on [0, 32]
    weights = [Fraction(3, 32), Fraction(3, 32), Fraction(1, 8), Fraction(1, 8)]
    widths = [(Fraction(0), 32 * w) for w in weights]
    shift = Fraction(9, 16) * 16
    for y in (9.0, 9.5, 12.0, 16.0, 20.0, 22.0, 22.9):
        below, above = uniform_sum(widths, Fraction(y) - shift)
        assert_tail(law, y, float(below), upper=False)
        assert_tail(law, y, float(above), upper=True)


@pytest.fixture(scope="module")
def ewma_laws():
    return {
        "skewed": law_of_ewma(SKEWED, 5, 0.2),
        "lognormal": law_of_ewma(LOGNORMAL, 5, 0.2),
        "lognormal t=3": law_of_ewma(LOGNORMAL, 5, 0.2, t=3),
    }


def _ewma_sample(parent: Parent, n: int, lam: float, steps: int, size: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    value = np.full(size, parent.mean())
    for _ in range(steps):
        means = parent.ppf(rng.random((size, n))).mean(axis=1)
        value = (1.0 - lam) * value + lam * means
    return value


@pytest.mark.parametrize(
    ("key", "parent", "steps"),
    [("skewed", SKEWED, 80), ("lognormal", LOGNORMAL, 80), ("lognormal t=3", LOGNORMAL, 3)],
)
def test_ewma_laws_agree_with_monte_carlo(ewma_laws, key, parent, steps):
    """The EWMA after 80 subgroups (steady to 1e-15 of its variance) or 3, simulated 200 000 times."""
    sample = _ewma_sample(parent, 5, 0.2, steps, 200_000, seed=steps)
    monte_carlo_agrees(ewma_laws[key], sample, probabilities=(0.5, 0.1, 0.01))


@pytest.mark.parametrize(("key", "parent"), [("skewed", SKEWED), ("lognormal", LOGNORMAL)])
def test_steady_ewma_laws_agree_with_the_markov_chain_of_the_arl_module(ewma_laws, key, parent):
    """The steady-state EWMA tail against arl.ewma_tail on the standardized mean (an independent chain)."""
    law = ewma_laws[key]
    cdf = standardized_mean_cdf(parent, 5)
    scale = parent.sd() / math.sqrt(5)
    # the chain converges to the law as its cells double; at 800 cells (Richardson-extrapolated)
    # it is within 4e-5 of it here (1e-7 at 3200 cells, checked by hand)
    upper = ewma_tail(0.2, 1.2, cdf=cdf, cells=800)
    lower = ewma_tail(0.2, -0.9, cdf=cdf, side="lower", cells=800)
    assert law.tail(parent.mean() + 1.2 * scale, upper=True) == pytest.approx(upper, rel=1e-4)
    assert law.tail(parent.mean() - 0.9 * scale, upper=False) == pytest.approx(lower, rel=1e-4)


# ------------------------------------------------------------------ limits and alarm rates


@pytest.mark.parametrize(
    "parent", [SKEWED, LOGNORMAL, NORMAL, parse_parent("exponential:mean=1")], ids=lambda p: p.name
)
def test_probability_limits_have_the_stated_tails(skewed_laws, parent):
    """The limits' tails under the law equal the asked probabilities (and under an independent witness)."""
    law = skewed_laws[5] if parent is SKEWED else law_of_mean(parent, 5)
    low, high = probability_limits(law)
    assert law.tail(low, upper=False) == pytest.approx(0.00135, rel=1e-8)
    assert law.tail(high, upper=True) == pytest.approx(0.00135, rel=1e-8)
    low, high = probability_limits(law, lower_tail=0.001, upper_tail=0.0001)
    assert law.tail(low, upper=False) == pytest.approx(0.001, rel=1e-8)
    assert law.tail(high, upper=True) == pytest.approx(0.0001, rel=1e-8)
    if parent is SKEWED:
        below, _ = triangular_sum(0, 6, 32, 5, Fraction(low) * 5)
        _, above = triangular_sum(0, 6, 32, 5, Fraction(high) * 5)
        assert float(below) == pytest.approx(0.001, rel=1e-7)
        assert float(above) == pytest.approx(0.0001, rel=1e-7)
    if parent.name == "exponential":
        assert stats.gamma(5, scale=0.2).sf(high) == pytest.approx(0.0001, rel=1e-9)


def test_probability_limits_refuse_tails_that_are_not_small_probabilities():
    """Tails must lie in (0, 0.5)."""
    law = law_of_mean(NORMAL, 4)
    for bad in (0.0, 0.5, -0.1, float("nan")):
        with pytest.raises(ConfigError):
            probability_limits(law, upper_tail=bad)


def test_three_sigma_limits_for_means_of_four_exponential_readings_alarm_far_too_often():
    """Exponential(1), n = 4: mean 1, sigma of the mean 1/2; UCL 2.5, LCL below zero (scipy gamma(4, 1/4))."""
    low, high = true_false_alarm_rate(parse_parent("exponential:mean=1"), 4)
    assert low == 0.0
    assert high == pytest.approx(stats.gamma(4, scale=0.25).sf(2.5), rel=1e-12)
    assert high / stats.norm.sf(3.0) > 7.0


def test_three_sigma_limits_are_right_for_normal_readings_and_wrong_for_skewed_ones(skewed_laws):
    """Normal: 0.00135 each side; skewed triangular, n = 5: the exact sum of truncated powers (fractions)."""
    low, high = true_false_alarm_rate(NORMAL, 5)
    assert low == pytest.approx(stats.norm.cdf(-3.0), rel=1e-12)
    assert high == pytest.approx(stats.norm.sf(3.0), rel=1e-12)
    low, high = true_false_alarm_rate(SKEWED, 5)
    half = 3.0 * SKEWED.sd() / math.sqrt(5)
    below, _ = triangular_sum(0, 6, 32, 5, Fraction(SKEWED.mean() - half) * 5)
    _, above = triangular_sum(0, 6, 32, 5, Fraction(SKEWED.mean() + half) * 5)
    assert low == pytest.approx(float(below), rel=1e-7)
    assert high == pytest.approx(float(above), rel=1e-7)
    assert high > stats.norm.sf(3.0) > low


def test_the_standardized_mean_cdf_feeds_the_run_length_chains():
    """Normal: the cdf is Phi(z - shift sqrt n); exponential n = 4: the gamma's; ARL as the closed form."""
    cdf = standardized_mean_cdf(NORMAL, 4, shift=0.5)
    z = np.linspace(-4, 4, 17)
    np.testing.assert_allclose(cdf(z), stats.norm.cdf(z - 1.0), rtol=1e-12, atol=1e-300)
    exponential = parse_parent("exponential:mean=1")
    cdf = standardized_mean_cdf(exponential, 4)
    np.testing.assert_allclose(cdf(z), stats.gamma(4, scale=0.25).cdf(1.0 + 0.5 * z), rtol=1e-12, atol=1e-300)
    low, high = true_false_alarm_rate(exponential, 4)
    assert shewhart_arl([Rule.beyond_limits()], cdf=cdf).arl == pytest.approx(1.0 / (low + high), rel=1e-10)


# ------------------------------------------------------------------ p-values of signals


def _signal(chart, values, statistic, rule=RuleId.BEYOND_LIMITS):
    found = []
    for subgroup in values:
        found.extend(chart.update(Subgroup(tuple(subgroup))))
    return next(s for s in found if s.statistic is statistic and s.rule is rule)


def test_beyond_limits_p_values_of_means_equal_the_normal_theory_ones_for_a_normal_parent():
    """Mean above and below its limits: signal_p_value with a normal parent equals pvalues.p_value."""
    parent = parse_parent("normal:mean=10,sd=1")
    for values, side in (
        ((11.6, 11.4, 11.9, 11.5, 11.3), Side.UPPER),
        ((8.4, 8.6, 8.1, 8.5, 8.7), Side.LOWER),
    ):
        chart = XbarRChart(mean=10.0, sigma=1.0, rules=(Rule.beyond_limits(),))
        signal = _signal(chart, [values], Statistic.MEAN)
        assert signal.side is side
        ours = signal_p_value(signal, parent=parent, n=5)
        assert isinstance(ours, SignalPValue)
        assert ours.value == pytest.approx(p_value(signal, n=5).value, rel=1e-10)
        assert ours.parent == parent.describe()
        assert ours.method == CLOSED_FORM


def test_a_mean_beyond_its_limits_under_a_skewed_parent_gets_the_exact_tail(skewed_laws):
    """Skewed triangular, n = 5: the p-value is the exact P(mean >= value) (fractions), not the normal one."""
    chart = XbarRChart(mean=SKEWED.mean(), sigma=SKEWED.sd(), rules=(Rule.beyond_limits(),))
    signal = _signal(chart, [(22.0, 23.0, 24.0, 21.0, 25.0)], Statistic.MEAN)
    result = signal_p_value(signal, parent=SKEWED, n=5)
    _, above = triangular_sum(0, 6, 32, 5, Fraction(signal.value) * 5)
    assert result.value == pytest.approx(float(above), rel=1e-7)
    assert result.method == CONVOLUTION
    assert result.value > p_value(signal, n=5).value  # a long right tail: more likely than normal theory says


def test_individuals_and_moving_ranges_get_their_laws():
    """Individuals: the parent's own tail; moving range of 2: the range law (normal: p_value's)."""
    parent = parse_parent("normal:mean=0,sd=2")
    chart = IndividualsChart(mean=0.0, sigma=2.0, rules=(Rule.beyond_limits(),))
    found = []
    for value in (0.0, 7.0, -1.0):
        found.extend(chart.update(Subgroup((value,))))
    individual = next(s for s in found if s.statistic is Statistic.INDIVIDUAL)
    moving = next(s for s in found if s.statistic is Statistic.MOVING_RANGE)
    assert signal_p_value(individual, parent=parent, n=1).value == pytest.approx(
        stats.norm.sf(3.5), rel=1e-12
    )
    expected = p_value(moving, n=2).value
    assert signal_p_value(moving, parent=parent, n=2).value == pytest.approx(expected, rel=1e-8)
    # a uniform parent: the moving range of two is width times beta(1, 2)
    flat = parse_parent("uniform:low=-4,high=4")
    assert signal_p_value(moving, parent=flat, n=2).value == pytest.approx(
        stats.beta(1, 2, scale=8.0).sf(moving.value)
    )


def test_spread_signals_get_the_range_and_sd_laws():
    """Range and sd beyond their limits: with a normal parent, the normal-theory p-values."""
    parent = parse_parent("normal:mean=0,sd=1")
    chart = XbarRChart(mean=0.0, sigma=1.0, rules=(Rule.beyond_limits(),))
    signal = _signal(chart, [(-3.0, 3.1, 0.2, 0.0, 0.1)], Statistic.RANGE)
    assert signal_p_value(signal, parent=parent, n=5).value == pytest.approx(
        p_value(signal, n=5).value, rel=1e-8
    )
    chart = XbarSChart(mean=0.0, sigma=1.0, rules=(Rule.beyond_limits(),))
    signal = _signal(chart, [(-2.9, 2.8, -2.5, 2.6)], Statistic.SD)
    assert signal_p_value(signal, parent=parent, n=4).value == pytest.approx(
        p_value(signal, n=4).value, rel=1e-10
    )


def test_ewma_signals_get_the_ewma_law_at_their_subgroup():
    """An EWMA point beyond its limits: normal parent gives p_value's tail (exact variance at t)."""
    parent = parse_parent("normal:mean=0,sd=1")
    chart = EwmaChart(mean=0.0, sigma=1.0, smoothing=0.2, width=3.0)
    found = []
    for value in (0.5, 1.0, 2.5, 3.0):
        found.extend(chart.update(Subgroup((value,))))
    signal = next(s for s in found if s.statistic is Statistic.EWMA)
    result = signal_p_value(signal, parent=parent, n=1, smoothing=0.2, t=signal.subgroup + 1)
    assert result.value == pytest.approx(p_value(signal, n=1).value, rel=1e-10)
    with pytest.raises(ConfigError, match="smoothing"):
        signal_p_value(signal, parent=parent, n=1)


@pytest.mark.parametrize(
    ("rule", "values"),
    [
        (Rule.outer_zone_cluster(), [2.5, 0.0, 2.5]),
        (Rule.middle_zone_cluster(), [1.5, 1.5, 0.0, 1.5, 1.5]),
        (Rule.same_side_run(), [0.5] * 9),
        (Rule.steady_trend(), [0.1, 0.2, 0.3, 0.4, 0.5, 0.6]),
        (Rule.alternating_run(), [0.5, -0.5] * 7),
        (Rule.hugging_center(), [0.1, -0.1] * 8),
        (Rule.avoiding_center(), [1.5, -1.5] * 4),
    ],
    ids=lambda r: getattr(r, "id", "values"),
)
def test_run_rule_p_values_equal_the_pattern_probabilities_for_a_normal_parent(rule, values):
    """Each run rule's p-value with a normal parent is its closed-form pattern probability."""
    parent = parse_parent("normal:mean=0,sd=1")
    chart = IndividualsChart(mean=0.0, sigma=1.0, rules=(rule,))
    signal = _signal(chart, [(v,) for v in values], Statistic.INDIVIDUAL, rule.id)
    result = signal_p_value(signal, parent=parent, n=1, rules=(rule,))
    assert result.value == pytest.approx(pattern_probability(rule), rel=1e-10)
    assert result.value == pytest.approx(p_value(signal, n=1, rules=(rule,)).value, rel=1e-10)


def test_a_same_side_run_under_a_skewed_parent_uses_its_own_median():
    """Exponential readings: P(above the mean) = e^-1, so a run of L has probability e^-L + (1 - e^-1)^L."""
    parent = parse_parent("exponential:mean=1")
    rule = Rule.same_side_run()
    chart = IndividualsChart(mean=1.0, sigma=1.0, rules=(rule,))
    signal = _signal(chart, [(1.5,)] * rule.length, Statistic.INDIVIDUAL, rule.id)
    expected = math.exp(-rule.length) + (1.0 - math.exp(-1.0)) ** rule.length
    assert signal_p_value(signal, parent=parent, n=1, rules=(rule,)).value == pytest.approx(
        expected, rel=1e-12
    )


def test_cusum_and_count_signals_say_how_they_are_handled():
    """CUSUM: no value here (the run-length module); p charts: the normal approximation of p_value."""
    parent = parse_parent("normal:mean=0,sd=1")
    chart = CusumChart(mean=0.0, sigma=1.0, k=0.5, h=4.0)
    found = []
    for value in (2.0, 2.0, 2.0, 2.0):
        found.extend(chart.update(Subgroup((value,))))
    cusum = found[0]
    result = signal_p_value(cusum, parent=parent, n=1)
    assert result.value is None
    assert "Markov chain" in result.method
    chart = PChart(proportion=0.1, rules=(Rule.beyond_limits(),))
    signal = chart.update(Subgroup((30.0,), exposures=(100.0,)))[0]
    result = signal_p_value(signal, parent=parent, n=100)
    assert result.value == pytest.approx(p_value(signal, n=100).value)
    assert "counts" in result.parent


def test_nelson_rules_give_p_values_for_every_signal_they_raise():
    """Every signal of a chart with the Nelson rules gets a p-value in [0, 1] under a skewed parent.

    A point beyond the triangular parent's support gets exactly 0: impossible in control.
    """
    chart = IndividualsChart(mean=SKEWED.mean(), sigma=SKEWED.sd(), rules=nelson())
    readings = draws(SKEWED, 400, seed=21)
    readings[100:110] += 12.0
    signals = []
    for value in readings.tolist():
        signals.extend(chart.update(Subgroup((value,))))
    assert signals
    for signal in signals:
        result = signal_p_value(signal, parent=SKEWED, n=1, rules=nelson())
        assert result.value is not None, signal
        assert 0.0 <= result.value <= 1.0, signal
        if signal.rule is RuleId.BEYOND_LIMITS and signal.statistic is Statistic.INDIVIDUAL:
            assert (result.value == 0.0) == (signal.value >= 32.0), signal


# ------------------------------------------------------------------ the cache


def test_the_law_cache_builds_each_law_once_per_limits_version():
    """The same (statistic, parent, n, version) is built once; another version is built again."""
    cache = LawCache(maxsize=2)
    first = cache.mean(SKEWED, 5, version=1)
    assert cache.mean(SKEWED, 5, version=1) is first
    assert cache.mean(SKEWED, 5, version=2) is not first
    assert (cache.hits, cache.misses) == (1, 2)
    cache.mean(SKEWED, 4, version=1)
    assert len(cache) == 2  # least recently used out
    with pytest.raises(ConfigError):
        LawCache(maxsize=0)


def test_bad_arguments_are_refused_with_clear_messages():
    """Subgroup sizes, smoothing and parents are checked."""
    with pytest.raises(ConfigError, match="n"):
        law_of_mean(SKEWED, 0)
    with pytest.raises(ConfigError, match="lambda"):
        law_of_ewma(SKEWED, 5, 1.5)
    with pytest.raises(ConfigError, match="parent"):
        law_of_mean("triangular", 5)  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="at least 2"):
        law_of_range(SKEWED, 1)
    with pytest.raises(ConfigError, match="normal"):
        law_of_mean(NORMAL, 5, numerical=True)
