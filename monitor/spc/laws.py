"""Laws of chart statistics under the process as it is, and the p-values and limits they give.

Normal-theory limits and p-values assume the plotted point is normal. With small subgroups from
a skewed process that is false far in the tails, where limits sit. This module computes the
in-control law of each plotted statistic from a :class:`~monitor.spc.parents.Parent` model of
single readings, states how (``method``) and how precisely (``error_bound``), and turns it into
p-values of signals and probability limits.

Methods, by statistic and parent:

==================  ===================================================  ============================
statistic           parents                                              method
==================  ===================================================  ============================
mean of n           normal; gamma, exponential (Weibull of shape 1):     closed form
                    the mean of n is gamma(n shape, scale / n)
mean of n           uniform: scaled Irwin-Hall (Bates) law of n;         closed form
                    symmetric triangular: Bates law of 2n uniforms
mean of n           asymmetric triangular, empirical                     convolution (Fourier series)
mean of n           lognormal, Weibull                                   convolution (in x)
range of n          uniform (beta), exponential ((1 - e^(-r/m))^(n-1))   closed form
range of n          any other                                            numerical integration
sd of n             normal (chi law with n - 1 degrees of freedom)       closed form
sd of 2             any (the range over sqrt 2)                          as the range
sd of n >= 3        any other                                            randomized quasi-Monte Carlo
                                                                         with importance sampling
EWMA                normal                                               closed form
EWMA                lognormal, Weibull                                   convolution (in x)
EWMA                any other                                            convolution (Fourier series)
one reading         the parent itself                                    closed form
==================  ===================================================  ============================

"convolution (Fourier series)": the n-fold convolution done through characteristic functions:
the law of the statistic on a window that holds its mass is a Fourier series whose coefficients
are values of its characteristic function (a product of the readings' ones, in closed form for
uniform, triangular, gamma and empirical parents). Nothing is discretised in x, so there is no
grid error to bound: the error is the series truncation and round-off. Round-off is an absolute
floor of about 1e-16, so the tails are computed from exponentially tilted series (the tilted law
has its mass near the tail point of interest, where the same relative precision then holds, and
the tilt is undone exactly). Every value carries an estimated relative error; only values
precise to 1e-7 relative are kept. See :mod:`monitor.spc._spectral`.

"convolution (in x)": lognormal and Weibull readings have no useful closed-form characteristic
function, and a lognormal (or a Weibull of shape below 1) has no moment generating function, so
its upper tails cannot be tilted. Their sums are built by doubling (the law of 2k readings from
that of k) with every probability an integral of positive terms, computed by Gauss-Legendre
quadrature on the probability scale; each step's law is tabulated in log(x) and checked at
midpoints. Tails keep their relative precision to 1e-40. See :mod:`monitor.spc._integrals`.

Every law is held as an interpolation table of its log tails (cubic Hermite with the exact
slopes, checked at every midpoint, refined until it matches to 1e-9 relative), so once built
a CDF or p-value costs a table look-up (microseconds). ``error_bound`` adds the method's bound,
the table's largest interpolation error and the mass left out; ``relative_error`` bounds tail
probabilities relatively down to ``tail_floor``; below that values are extrapolated (in the log
of the distance to a finite end of the support, where a tail that is a power of that distance
is continued exactly).

The EWMA is ``e_t = (1 - lambda)^t target + sum_(j<t) lambda (1 - lambda)^j xbar_(t-j)``,
started at the target. Its law is computed exactly for the first J past subgroups and the rest
is treated as normal (its mean and variance exact) with a bound from its third absolute moment
(Berry-Esseen style, on the characteristic function); J is chosen so that bound is below 1e-13.

Examples:
    >>> from monitor.spc.parents import parse_parent
    >>> law = law_of_mean(parse_parent("exponential:mean=1"), 4)
    >>> law.method
    'closed form'
    >>> low, high = true_false_alarm_rate(parse_parent("exponential:mean=1"), 4)
    >>> round(high, 5), round(high / 0.0013499, 2)  # above the 3-sigma UCL 7.7 times too often
    (0.01034, 7.66)
"""

from __future__ import annotations

import math
import numbers
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Final, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special, stats

from monitor.spc._integrals import (
    PositiveReading,
    PositiveSum,
    RangeIntegral,
    ScaledLevel,
    SdSimulation,
    level_error,
    level_nodes,
    sum_nodes,
    sum_of,
    weighted_sum,
)
from monitor.spc._spectral import (
    TAIL_FLOOR,
    QuadratureSpectrum,
    Term,
    WeightedSum,
    series_law,
    spectrum_of,
)
from monitor.spc._tables import Table, build_table, tabulate
from monitor.spc.errors import ConfigError
from monitor.spc.parents import Parent
from monitor.spc.pvalues import p_value as normal_p_value
from monitor.spc.pvalues import pattern_probability
from monitor.spc.rules import Rule
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.types import Statistic

__all__ = [
    "CLOSED_FORM",
    "CONVOLUTION",
    "INTEGRATION",
    "SIMULATION",
    "ExactLaw",
    "Law",
    "LawCache",
    "SignalPValue",
    "TabulatedLaw",
    "law_of_ewma",
    "law_of_mean",
    "law_of_range",
    "law_of_sd",
    "probability_limits",
    "signal_p_value",
    "standardized_mean_cdf",
    "true_false_alarm_rate",
    "zone_probabilities",
]

FloatArray = NDArray[np.float64]

CLOSED_FORM: Final = "closed form"
CONVOLUTION: Final = "convolution"
INTEGRATION: Final = "numerical integration"
SIMULATION: Final = "randomized quasi-Monte Carlo with importance sampling"
CUSUM_METHOD: Final = "Markov chain (not in this module)"
EXACT_ERROR: Final = 1e-14
"""Stated bound of closed forms evaluated by special functions (a few units of rounding)."""
BATES_EXACT_MAX: Final = 100
"""Up to this many uniforms the Irwin-Hall law is evaluated from exact rational coefficients."""
_EWMA_BOUND: Final = 1e-13
QUADRATURE_TAIL_FLOOR: Final = 1e-16
"""EWMA laws of lognormal and Weibull readings are computed by series down to these tails."""
SD_PRECISION: Final = 0.1
"""Simulated sd laws keep tail values known to this relative error (three standard errors)."""
POSITIVE_TAIL_FLOOR: Final = 1e-40
"""Laws of means of positive readings (lognormal, Weibull) are tabulated down to these tails."""


def _floats(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


# ---------------------------------------------------------------- the law objects


class Law(Protocol):
    """The in-control (or shifted) distribution of one plotted statistic."""

    @property
    def method(self) -> str:
        """How it was obtained: closed form, convolution, numerical integration, ..."""
        ...

    @property
    def parent(self) -> Parent:
        """The parent model of single readings it derives from."""
        ...

    @property
    def error_bound(self) -> float | None:
        """Stated bound on the absolute error of ``cdf`` and ``sf`` (None: not bounded)."""
        ...

    @property
    def detail(self) -> str:
        """One line on how, for people."""
        ...

    def cdf(self, x: ArrayLike) -> FloatArray:
        """P(Y <= x), element-wise."""
        ...

    def sf(self, x: ArrayLike) -> FloatArray:
        """P(Y > x), element-wise, with relative precision in the upper tail."""
        ...

    def ppf(self, q: ArrayLike) -> FloatArray:
        """Quantiles: y with P(Y <= y) = q."""
        ...

    def isf(self, q: ArrayLike) -> FloatArray:
        """Upper quantiles: y with P(Y > y) = q."""
        ...

    def tail(self, x: float, *, upper: bool) -> float:
        """P(Y > x) (upper) or P(Y < x) for one value, fast."""
        ...


@dataclass(frozen=True, eq=False)
class ExactLaw:
    """A law evaluated by closed-form special functions.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> law = law_of_mean(Parent.of("normal", mean=16.0, sd=6.0), 25)
        >>> round(law.tail(18.0, upper=True), 4)
        0.0478
    """

    method: str
    parent: Parent
    error_bound: float | None
    detail: str
    support: tuple[float, float]
    _cdf: Callable[[FloatArray], FloatArray] = field(repr=False)
    _sf: Callable[[FloatArray], FloatArray] = field(repr=False)
    _ppf: Callable[[FloatArray], FloatArray] = field(repr=False)
    _isf: Callable[[FloatArray], FloatArray] = field(repr=False)
    _tail: Callable[[float, bool], float] = field(repr=False)

    def cdf(self, x: ArrayLike) -> FloatArray:
        """P(Y <= x)."""
        return _floats(self._cdf(_floats(x)))

    def sf(self, x: ArrayLike) -> FloatArray:
        """P(Y > x)."""
        return _floats(self._sf(_floats(x)))

    def ppf(self, q: ArrayLike) -> FloatArray:
        """Y with P(Y <= y) = q."""
        return _floats(self._ppf(_checked_probability(q)))

    def isf(self, q: ArrayLike) -> FloatArray:
        """Y with P(Y > y) = q."""
        return _floats(self._isf(_checked_probability(q)))

    def tail(self, x: float, *, upper: bool) -> float:
        """P(Y > x) or P(Y < x), one value."""
        return self._tail(float(x), upper)


@dataclass(frozen=True, eq=False)
class TabulatedLaw:
    """A law held as an interpolation table of its log tails (see the module notes).

    Attributes:
        relative_error: bound on the relative error of tail probabilities from the table
            (inside ``[table.lower_end, table.upper_end]`` and above ``tail_floor``).
        tail_floor: tail probabilities below this are extrapolations of the table.
    """

    method: str
    parent: Parent
    error_bound: float | None
    detail: str
    table: Table = field(repr=False)
    relative_error: float = 0.0
    tail_floor: float = 0.0

    @property
    def support(self) -> tuple[float, float]:
        """Where the law has its mass."""
        return self.table.support

    def cdf(self, x: ArrayLike) -> FloatArray:
        """P(Y <= x)."""
        return self.table.cdf(x)

    def sf(self, x: ArrayLike) -> FloatArray:
        """P(Y > x)."""
        return self.table.sf(x)

    def ppf(self, q: ArrayLike) -> FloatArray:
        """Y with P(Y <= y) = q."""
        return self.table.ppf(_checked_probability(q))

    def isf(self, q: ArrayLike) -> FloatArray:
        """Y with P(Y > y) = q."""
        return self.table.isf(_checked_probability(q))

    def tail(self, x: float, *, upper: bool) -> float:
        """P(Y > x) or P(Y < x), one value."""
        return self.table.tail(float(x), upper=upper)


def _checked_probability(q: ArrayLike) -> FloatArray:
    qa = _floats(q)
    if not bool(np.all((qa >= 0.0) & (qa <= 1.0))):
        raise ConfigError(f"probabilities must lie in [0, 1], got {q!r}")
    return qa


# ---------------------------------------------------------------- arguments


def _count(name: str, value: object, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        raise ConfigError(f"{name} must be an integer of at least {minimum}, got {value!r}")
    return int(value)


def _number(name: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(float(value)):
        raise ConfigError(f"{name} must be a finite number, got {value!r}")
    return float(value)


def _parent(parent: object) -> Parent:
    if not isinstance(parent, Parent):
        raise ConfigError(f"parent must be a Parent (see parse_parent), got {parent!r}")
    return parent


# ---------------------------------------------------------------- closed forms


def _normal_law(parent: Parent, mean: float, sd: float, method_detail: str) -> ExactLaw:
    root2 = math.sqrt(2.0)

    def tail(x: float, upper: bool) -> float:
        z = (x - mean) / (sd * root2)
        return 0.5 * math.erfc(z if upper else -z)

    return ExactLaw(
        method=CLOSED_FORM,
        parent=parent,
        error_bound=EXACT_ERROR,
        detail=method_detail,
        support=(-math.inf, math.inf),
        _cdf=lambda x: _floats(special.ndtr((x - mean) / sd)),
        _sf=lambda x: _floats(special.ndtr((mean - x) / sd)),
        _ppf=lambda q: mean + sd * _floats(special.ndtri(q)),
        _isf=lambda q: mean - sd * _floats(special.ndtri(q)),
        _tail=tail,
    )


def _gamma_law(parent: Parent, shape: float, scale: float, method_detail: str) -> ExactLaw:
    def tail(x: float, upper: bool) -> float:
        if x <= 0:
            return 1.0 if upper else 0.0
        fn = special.gammaincc if upper else special.gammainc
        return float(fn(shape, x / scale))

    return ExactLaw(
        method=CLOSED_FORM,
        parent=parent,
        error_bound=EXACT_ERROR,
        detail=method_detail,
        support=(0.0, math.inf),
        _cdf=lambda x: _floats(special.gammainc(shape, np.maximum(x, 0.0) / scale)),
        _sf=lambda x: _floats(special.gammaincc(shape, np.maximum(x, 0.0) / scale)),
        _ppf=lambda q: scale * _floats(special.gammaincinv(shape, q)),
        _isf=lambda q: scale * _floats(special.gammainccinv(shape, q)),
        _tail=tail,
    )


def _parent_tail(parent: Parent) -> Callable[[float, bool], float]:
    """P(X > x) or P(X < x) for one reading, in plain floats where a formula exists."""
    name = parent.name
    p = dict(parent.params)
    root2 = math.sqrt(2.0)
    if name == "normal":
        mu, sd = p["mean"], p["sd"]

        def normal(x: float, upper: bool) -> float:
            z = (x - mu) / (sd * root2)
            return 0.5 * math.erfc(z if upper else -z)

        return normal
    if name == "lognormal":
        mu, sd = p["log_mean"], p["log_sd"]

        def lognormal(x: float, upper: bool) -> float:
            if x <= 0:
                return 1.0 if upper else 0.0
            z = (math.log(x) - mu) / (sd * root2)
            return 0.5 * math.erfc(z if upper else -z)

        return lognormal
    if name == "weibull":
        k, lam = p["shape"], p["scale"]

        def weibull(x: float, upper: bool) -> float:
            power = (max(x, 0.0) / lam) ** k
            return math.exp(-power) if upper else -math.expm1(-power)

        return weibull
    if name in ("gamma", "exponential"):
        shape = p.get("shape", 1.0)
        scale = p.get("scale", p.get("mean", 1.0))

        def gamma(x: float, upper: bool) -> float:
            if x <= 0:
                return 1.0 if upper else 0.0
            return float((special.gammaincc if upper else special.gammainc)(shape, x / scale))

        return gamma

    def general(x: float, upper: bool) -> float:
        return float((parent.sf if upper else parent.cdf)(x))

    return general


def _reading_law(parent: Parent) -> ExactLaw:
    """The law of one reading: the parent itself."""
    exact = parent.grid is None
    return ExactLaw(
        method=CLOSED_FORM if exact else "exact (empirical model)",
        parent=parent,
        error_bound=EXACT_ERROR if exact else 1e-13,
        detail=f"one reading: {parent.describe()}",
        support=parent.support,
        _cdf=parent.cdf,
        _sf=parent.sf,
        _ppf=parent.ppf,
        _isf=parent.isf,
        _tail=_parent_tail(parent),
    )


@lru_cache(maxsize=16)
def _irwin_hall_coefficients(m: int) -> FloatArray:
    """Taylor coefficients of the Irwin-Hall CDF of m uniforms on each [j, j + 1], exactly rounded.

    ``F(j + t) = sum_i a[j, i] t^i`` with ``a[j, i] = C(m, i) / m! * sum_(k <= j) (-1)^k C(m, k)
    (j - k)^(m - i)``: integers summed exactly, divided once (no cancellation in floats).
    """
    fact = math.factorial(m)
    binom = [math.comb(m, k) for k in range(m + 1)]
    out = np.zeros((m, m + 1))
    # powers[d][e] = d^e for the distances d = j - k that occur
    powers = [[d**e for e in range(m + 1)] for d in range(m)]
    for j in range(m):
        signed = [(-binom[k] if k % 2 else binom[k], powers[j - k]) for k in range(j + 1)]
        for i in range(m + 1):
            total = sum(b * p[m - i] for b, p in signed)
            # int / int is correctly rounded in Python: the exact rational, rounded once
            out[j, i] = binom[i] * total / fact
    out.setflags(write=False)
    return out


def _irwin_hall(u: FloatArray, m: int) -> tuple[FloatArray, FloatArray]:
    """(CDF, density) of the Irwin-Hall law of m uniforms at u in [0, m/2] (Horner on exact coefficients)."""
    c = _irwin_hall_coefficients(m)
    j = np.clip(np.floor(u).astype(np.int64), 0, m - 1)
    t = u - j
    value = np.zeros(u.shape)
    slope = np.zeros(u.shape)
    for i in range(m, -1, -1):
        slope = slope * t + value
        value = value * t + c[j, i]
    return np.where(u <= 0, 0.0, value), np.where(u <= 0, 0.0, slope)


def _bates_law(parent: Parent, m: int, low: float, high: float, what: str) -> TabulatedLaw:
    """The mean of m uniforms on [low, high] (Bates law), tabulated from exact values."""
    width = high - low

    def evaluate(x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        u = np.clip((x - low) / width * m, 0.0, float(m))
        lower = u <= 0.5 * m
        near = np.where(lower, u, m - u)
        value, slope = _irwin_hall(near, m)
        with np.errstate(divide="ignore"):
            log_small = np.log(value)
            log_large = np.log1p(-np.minimum(value, 1.0))
        log_cdf = np.where(lower, log_small, log_large)
        log_sf = np.where(lower, log_large, log_small)
        return log_cdf, log_sf, slope * m / width, np.full(x.shape[0], 1e-14)

    sd = width / math.sqrt(12.0 * m)
    nodes = _core_nodes(0.5 * (low + high), sd, (low, high))
    grid, _, _ = tabulate(evaluate, nodes, support=(low, high))
    table, interpolation, relative = build_table(grid, support=(low, high))
    return TabulatedLaw(
        method=CLOSED_FORM,
        parent=parent,
        error_bound=EXACT_ERROR + interpolation,
        detail=f"{what}: Irwin-Hall law of {m} uniforms (exact coefficients), tabulated",
        table=table,
        relative_error=max(relative, 1e-13),
        tail_floor=0.0,
    )


def _core_nodes(center: float, sd: float, support: tuple[float, float], per_sd: int = 32) -> FloatArray:
    """Nodes every sd / per_sd over +/- 12 sd, then doubling outwards to the support (at most 1e4 sd)."""
    lo = max(support[0], center - 1e4 * sd)
    hi = min(support[1], center + 1e4 * sd)
    core = np.arange(max(lo, center - 12.0 * sd), min(hi, center + 12.0 * sd), sd / per_sd)
    outer_hi = center + 12.0 * sd + sd / per_sd * np.cumsum(2.0 ** np.arange(1, 40))
    outer_lo = center - 12.0 * sd - sd / per_sd * np.cumsum(2.0 ** np.arange(1, 40))
    nodes = np.concatenate([[lo, hi], core, outer_hi[outer_hi < hi], outer_lo[outer_lo > lo]])
    return np.unique(nodes[np.isfinite(nodes)])


# ---------------------------------------------------------------- convolution laws


def _series_table(parent: Parent, stat: WeightedSum, what: str, *, numerical: bool = False) -> TabulatedLaw:
    spectrum = spectrum_of(parent, numerical=numerical)
    # quadrature spectra (lognormal, Weibull) stop at QUADRATURE_TAIL_FLOOR: deeper tilts cost much
    floor = QUADRATURE_TAIL_FLOOR if isinstance(spectrum, QuadratureSpectrum) else TAIL_FLOOR
    result = series_law(spectrum, stat, floor=floor)
    table, interpolation, relative = build_table(result.grid, support=result.support)
    absolute = result.absolute_error + interpolation + result.numerical_absolute
    return TabulatedLaw(
        method=CONVOLUTION,
        parent=parent,
        error_bound=absolute,
        detail=(
            f"{what}: characteristic function and Fourier series ({result.terms} terms, "
            f"{result.tilts} tilts) on [{result.window[0]:.6g}, {result.window[1]:.6g}]"
        ),
        table=table,
        relative_error=result.numerical_error + relative,
        tail_floor=max(result.floor, _table_floor(table)),
    )


def _positive_table(parent: Parent, n: int, what: str) -> TabulatedLaw:
    """The mean of n positive readings by repeated convolution in x (see ``_integrals``)."""
    total = PositiveSum(parent, n)
    floor = math.log(POSITIVE_TAIL_FLOOR)

    def evaluate(y: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        lf, lF, lG = total.values(n * y)
        with np.errstate(over="ignore", invalid="ignore"):
            kept = (np.fmin(lF, lG) >= floor) & np.isfinite(lf)
        rel = np.where(kept, total.error, np.nan)
        return np.where(kept, lF, np.nan), np.where(kept, lG, np.nan), n * np.exp(lf), rel

    nodes = _reach_ends(evaluate, sum_nodes(total) / n)
    grid, precision, numeric = tabulate(evaluate, nodes, support=(0.0, math.inf))
    table, interpolation, relative = build_table(grid, support=(0.0, math.inf))
    return TabulatedLaw(
        method=CONVOLUTION,
        parent=parent,
        error_bound=numeric + interpolation + 1e-60 * n,
        detail=(
            f"{what}: repeated convolution in x by quadrature ({len(total.levels)} steps), "
            f"tails to {POSITIVE_TAIL_FLOOR:g}"
        ),
        table=table,
        relative_error=precision + relative,
        tail_floor=_table_floor(table),
    )


def _reach_ends(
    evaluate: Callable[[FloatArray], tuple[FloatArray, FloatArray, FloatArray, FloatArray]],
    nodes: FloatArray,
    *,
    rounds: int = 10,
) -> FloatArray:
    """Nodes (positive) with more added, by bisection in log, toward where values stop being kept."""
    x = np.unique(nodes)
    lc, ls, _, _ = evaluate(x)
    kept = np.flatnonzero(~np.isnan(lc) & ~np.isnan(ls))
    if kept.shape[0] == 0:
        return x
    ends = []
    if kept[0] > 0:
        ends.append([x[kept[0] - 1], x[kept[0]]])  # [dropped, kept]
    if kept[-1] < x.shape[0] - 1:
        ends.append([x[kept[-1] + 1], x[kept[-1]]])
    added: list[float] = []
    for _ in range(rounds):
        if not ends:
            break
        mid = np.sqrt(np.array([d * k for d, k in ends]))
        mc, ms, _, _ = evaluate(mid)
        for pair, m, ok in zip(ends, mid.tolist(), (~np.isnan(mc) & ~np.isnan(ms)).tolist(), strict=True):
            if ok:
                pair[1] = m
                added.append(m)
            else:
                pair[0] = m
    return np.unique(np.concatenate([x, np.asarray(added)]))


def _table_floor(table: Table) -> float:
    """The smaller of the tails at the table's two ends: below it values are extrapolated."""
    with np.errstate(under="ignore"):
        return float(max(math.exp(float(table.log_cdf[0])), math.exp(float(table.log_sf[-1]))))


def law_of_mean(parent: Parent, n: int, *, numerical: bool = False) -> ExactLaw | TabulatedLaw:
    """The in-control law of the mean of ``n`` readings.

    Args:
        parent: the in-control model of single readings.
        n: subgroup size (1: a single reading).
        numerical: use the convolution path even where a closed form exists (to check one
            against the other); not available for normal parents.

    Examples:
        >>> from monitor.spc.parents import parse_parent
        >>> law = law_of_mean(parse_parent("triangular:low=0,mode=16,high=32"), 25)
        >>> law.method, round(float(law.sf(18.0)), 4)
        ('closed form', 0.063)
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 1)
    name = parent.name
    if name == "normal":
        if numerical:
            raise ConfigError("numerical=True is for non-normal parents: the mean of normals is normal")
        sd = parent.sd() / math.sqrt(n)
        return _normal_law(parent, parent.mean(), sd, f"mean of {n}: normal({parent.mean():.6g}, {sd:.6g})")
    if n == 1 and not numerical:
        return _reading_law(parent)
    if not numerical:
        if name in ("gamma", "exponential") or (name == "weibull" and parent.param("shape") == 1.0):
            shape = parent.param("shape") if name == "gamma" else 1.0
            scale = parent.param("mean") if name == "exponential" else parent.param("scale")
            return _gamma_law(
                parent,
                n * shape,
                scale / n,
                f"mean of {n}: gamma(shape={n * shape:.6g}, scale={scale / n:.6g})",
            )
        if name == "uniform" and n <= BATES_EXACT_MAX:
            return _bates_law(parent, n, parent.param("low"), parent.param("high"), f"mean of {n}")
        if name == "triangular":
            low, mode, high = parent.param("low"), parent.param("mode"), parent.param("high")
            if abs(mode - 0.5 * (low + high)) <= 1e-12 * (high - low) and 2 * n <= BATES_EXACT_MAX:
                return _bates_law(parent, 2 * n, low, high, f"mean of {n} symmetric triangular readings")
    if name in ("lognormal", "weibull", "gamma", "exponential"):
        return _positive_table(parent, n, f"mean of {n}")
    if name not in ("uniform", "triangular", "empirical"):
        raise ConfigError(f"no law of the mean for parent {name!r}")  # pragma: no cover - all families listed
    return _series_table(
        parent, WeightedSum((Term(1.0 / n, n),), readings=n), f"mean of {n}", numerical=numerical
    )


def _ewma_sum(parent: Parent, n: int, smoothing: float, t: int | None, start: float) -> WeightedSum:
    """Terms of the EWMA: exact for the first J subgroups, the rest normal with a bound."""
    lam = smoothing
    keep = 1.0 - lam
    mu = parent.mean()
    var = parent.sd() ** 2
    spectrum_third = _abs_third(parent)
    sd_e = math.sqrt(var / n * lam / (2.0 - lam))
    horizon = 12.0 / sd_e  # frequencies that matter: |psi| ~ exp(-72) beyond
    # third-moment coefficient of the remainder from J on: n E|X - mu|^3 / 6 sum (w_j / n)^3
    r0 = n * spectrum_third / 6.0 * (lam / n) ** 3 / (1.0 - keep**3)
    if keep == 0.0:
        exact = 1
    else:
        needed = math.log(_EWMA_BOUND / max(r0 * horizon**3, 1e-300)) / (3.0 * math.log(keep))
        exact = max(1, math.ceil(needed))
    total = t if t is not None else None
    if total is not None:
        exact = min(exact, total)
    exact = min(exact, 4000)
    terms = tuple(Term(lam * keep**j / n, n) for j in range(exact))
    constant = keep**total * start if total is not None else 0.0
    # the remainder: subgroups exact .. total - 1 (or to infinity)
    if total is not None:
        tail_w1 = lam * (keep**exact - keep**total) / lam if keep > 0 else 0.0
        tail_w2 = (
            lam * lam * (keep ** (2 * exact) - keep ** (2 * total)) / (1.0 - keep * keep) if keep < 1 else 0.0
        )
        tail_w3 = lam**3 * (keep ** (3 * exact) - keep ** (3 * total)) / (1.0 - keep**3)
    else:
        tail_w1 = keep**exact
        tail_w2 = lam * lam * keep ** (2 * exact) / (1.0 - keep * keep)
        tail_w3 = lam**3 * keep ** (3 * exact) / (1.0 - keep**3)
    return WeightedSum(
        terms=terms,
        constant=constant,
        remainder_mean=mu * tail_w1,
        remainder_variance=var / n * tail_w2,
        remainder_third=n * spectrum_third / 6.0 * tail_w3 / n**3,
        readings=n * exact,
    )


def _abs_third(parent: Parent) -> float:
    """E|X - mean|^3 of one reading (numerically, on the spectrum's nodes)."""
    return float(spectrum_of(parent).abs_third)


def law_of_ewma(
    parent: Parent, n: int, smoothing: float, *, t: int | None = None, start: float | None = None
) -> ExactLaw | TabulatedLaw:
    """The in-control law of the EWMA of subgroup means after ``t`` subgroups (steady state if None).

    Args:
        parent: the in-control model of single readings.
        n: readings per subgroup.
        smoothing: the weight lambda of the newest subgroup, 0 < lambda <= 1.
        t: subgroups so far (the EWMA's variance grows to its steady value); None: steady state.
        start: the value the EWMA starts from (the chart's target); default the parent's mean.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> law = law_of_ewma(Parent.of("normal", mean=0.0, sd=1.0), 1, 0.2)
        >>> round(float(law.isf(0.00135)), 4)  # 3 sd of the steady EWMA: 3 sqrt(0.2 / 1.8)
        1.0
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 1)
    lam = _number("smoothing (lambda)", smoothing)
    if not 0.0 < lam <= 1.0:
        raise ConfigError(f"smoothing (lambda) must be in (0, 1], got {smoothing!r}")
    if t is not None:
        t = _count("t (subgroups so far)", t, 1)
    target = parent.mean() if start is None else _number("start", start)
    keep = 1.0 - lam
    if lam == 1.0:
        return law_of_mean(parent, n)
    if parent.name == "normal":
        factor = 1.0 - keep ** (2 * t) if t is not None else 1.0
        sd = parent.sd() * math.sqrt(lam / (2.0 - lam) * factor / n)
        weight = keep**t if t is not None else 0.0
        mean = weight * target + (1.0 - weight) * parent.mean()
        when = f"after {t} subgroups" if t is not None else "steady state"
        return _normal_law(
            parent, mean, sd, f"EWMA (lambda={lam:g}, n={n}, {when}): normal({mean:.6g}, {sd:.6g})"
        )
    when = f"after {t} subgroups" if t is not None else "steady state"
    if parent.name in ("lognormal", "weibull"):
        return _positive_ewma(parent, n, lam, t, target, f"EWMA (lambda={lam:g}, n={n}, {when})")
    stat = _ewma_sum(parent, n, lam, t, target)
    return _series_table(parent, stat, f"EWMA (lambda={lam:g}, n={n}, {when}, {len(stat.terms)} exact terms)")


def _positive_ewma(
    parent: Parent, n: int, lam: float, t: int | None, start: float, what: str
) -> TabulatedLaw:
    """The EWMA of means of positive readings by convolution in x (weights doubled in blocks).

    Steady state: the terms after the first J are replaced by their mean, J the first with
    ``(1 - lambda)^(2J) <= 1e-14`` (the variance they carry, relative to the EWMA's).
    """
    keep = 1.0 - lam
    mean_level = ScaledLevel(sum_of(parent, n) if n > 1 else PositiveReading(parent), 1.0 / n)
    if t is None:
        terms = max(1, math.ceil(math.log(1e-14) / (2.0 * math.log(keep))))
        shift = keep**terms * parent.mean()
        left_out = keep ** (2 * terms)
    else:
        terms, shift, left_out = t, keep**t * start, 0.0
    total = weighted_sum(mean_level, lam, keep, terms)
    floor = math.log(POSITIVE_TAIL_FLOOR)
    error = level_error(total) + 10.0 * left_out

    def evaluate(y: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        with np.errstate(invalid="ignore", divide="ignore"):
            lf, lF, lG = total.values(np.maximum(y - shift, 1e-300))
            kept = (np.fmin(lF, lG) >= floor) & np.isfinite(lf) & (y > shift)
        rel = np.where(kept, error, np.nan)
        return np.where(kept, lF, np.nan), np.where(kept, lG, np.nan), np.exp(lf), rel

    support = (shift, math.inf)
    nodes = shift + _reach_ends(lambda y: evaluate(y + shift), level_nodes(total))
    grid, precision, numeric = tabulate(evaluate, nodes, support=support)
    table, interpolation, relative = build_table(grid, support=support)
    return TabulatedLaw(
        method=CONVOLUTION,
        parent=parent,
        error_bound=numeric + interpolation,
        detail=f"{what}: {terms} subgroups' weighted means convolved in x by quadrature",
        table=table,
        relative_error=precision + relative,
        tail_floor=_table_floor(table),
    )


def law_of_range(parent: Parent, n: int) -> ExactLaw | TabulatedLaw:
    """The in-control law of the range of ``n`` readings (the moving range of span n too).

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> law = law_of_range(Parent.of("uniform", low=0.0, high=1.0), 2)
        >>> round(float(law.cdf(0.5)), 6)  # 1 - (1 - r)^2
        0.75
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 2)
    name = parent.name
    if name == "uniform":
        width = parent.param("high") - parent.param("low")
        a, b = float(n - 1), 2.0

        def tail(x: float, upper: bool) -> float:
            u = min(max(x / width, 0.0), 1.0)
            return float(special.betaincc(a, b, u) if upper else special.betainc(a, b, u))

        return ExactLaw(
            method=CLOSED_FORM,
            parent=parent,
            error_bound=EXACT_ERROR,
            detail=f"range of {n}: width times beta({n - 1}, 2)",
            support=(0.0, width),
            _cdf=lambda x: _floats(special.betainc(a, b, np.clip(x / width, 0.0, 1.0))),
            _sf=lambda x: _floats(special.betaincc(a, b, np.clip(x / width, 0.0, 1.0))),
            _ppf=lambda q: width * _floats(special.betaincinv(a, b, q)),
            _isf=lambda q: width * _floats(special.betainccinv(a, b, q)),
            _tail=tail,
        )
    exponential_scale = None
    if name == "exponential":
        exponential_scale = parent.param("mean")
    elif name in ("gamma", "weibull") and parent.param("shape") == 1.0:
        exponential_scale = parent.param("scale")
    if exponential_scale is not None:
        return _exponential_range(parent, n, exponential_scale)
    integral = RangeIntegral(parent, n)
    # the parent is cut at its 1e-24 quantiles: tail values much below n times that are dropped
    floor = max(1e-40, 1e6 * integral.cut)

    def evaluate(r: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        log_cdf, log_sf, pdf, rel = integral.evaluate(r)
        with np.errstate(invalid="ignore"):
            rel = np.where((log_sf < math.log(floor)) | (log_cdf < math.log(floor)), np.inf, rel)
        return _keep_precise(log_cdf, log_sf, pdf, rel, 1e-7)

    lo, hi = parent.support
    top = hi - lo if math.isfinite(hi - lo) else math.inf
    sd = parent.sd()
    nodes = _range_nodes(integral, sd, top)
    grid, precision, numeric = tabulate(evaluate, nodes, support=(0.0, top))
    table, interpolation, relative = build_table(grid, support=(0.0, top))
    return TabulatedLaw(
        method=INTEGRATION,
        parent=parent,
        error_bound=integral.cut + interpolation + max(numeric, 1e-15),
        detail=f"range of {n}: n * integral f(x) [F(x + r) - F(x)]^(n-1) dx, composite Gauss-Legendre",
        table=table,
        relative_error=precision + relative,
        tail_floor=floor,
    )


def _range_nodes(integral: RangeIntegral, sd: float, top: float) -> FloatArray:
    """Nodes for the range: fine near 0 and over the body, doubling out to where P(R > r) < 1e-32."""
    end = min(top, 8.0 * sd)
    while end < top:
        _, log_sf, _, _ = integral.evaluate(np.array([end]))
        if log_sf[0] < math.log(max(1e-42, 1e5 * integral.cut)) or not np.isfinite(log_sf[0]):
            break
        end = min(top, end * 1.25)
    fine = np.linspace(0.0, min(end, 10.0 * sd), 321)
    coarse = np.linspace(min(end, 10.0 * sd), end, 161)
    near_zero = sd * np.geomspace(1e-4, 0.05, 24)
    return np.unique(np.concatenate([fine, coarse, near_zero[near_zero < end]]))


def _exponential_range(parent: Parent, n: int, scale: float) -> ExactLaw:
    """Range of n exponentials: P(R <= r) = (1 - exp(-r / scale))^(n - 1) (Renyi's representation)."""
    k = n - 1

    def cdf(x: FloatArray) -> FloatArray:
        return _floats(np.power(-np.expm1(-np.maximum(x, 0.0) / scale), k))

    def sf(x: FloatArray) -> FloatArray:
        return _floats(-np.expm1(k * np.log1p(-np.exp(-np.maximum(x, 0.0) / scale))))

    def tail(x: float, upper: bool) -> float:
        if x <= 0:
            return 1.0 if upper else 0.0
        log_inner = math.log1p(-math.exp(-x / scale))  # log(1 - e^(-r/m)), precise for large r
        return -math.expm1(k * log_inner) if upper else math.exp(k * log_inner)

    return ExactLaw(
        method=CLOSED_FORM,
        parent=parent,
        error_bound=EXACT_ERROR,
        detail=f"range of {n} exponential readings: (1 - exp(-r / {scale:.6g}))^{k}",
        support=(0.0, math.inf),
        _cdf=cdf,
        _sf=sf,
        _ppf=lambda q: -scale * np.log1p(-np.power(q, 1.0 / k)),
        _isf=lambda q: -scale * np.log1p(-np.exp(np.log1p(-q) / k)),
        _tail=tail,
    )


def _keep_precise(
    log_cdf: FloatArray, log_sf: FloatArray, pdf: FloatArray, rel: FloatArray, limit: float
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    lc, ls = log_cdf.copy(), log_sf.copy()
    bad = ~(rel <= limit)
    lc[bad] = np.nan
    ls[bad] = np.nan
    return lc, ls, pdf, np.where(bad, np.nan, rel)


def law_of_sd(parent: Parent, n: int) -> ExactLaw | TabulatedLaw:
    """The in-control law of the sample standard deviation (divisor n - 1) of ``n`` readings.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> law = law_of_sd(Parent.of("normal", mean=0.0, sd=1.0), 5)
        >>> round(float(law.sf(1.0)), 4)  # P(chi-square with 4 d.f. > 4)
        0.406
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 2)
    if parent.name == "normal":
        sigma = parent.sd()
        df = n - 1
        half = df / 2.0

        def tail(x: float, upper: bool) -> float:
            if x <= 0:
                return 1.0 if upper else 0.0
            u = df * (x / sigma) ** 2 / 2.0
            return float((special.gammaincc if upper else special.gammainc)(half, u))

        return ExactLaw(
            method=CLOSED_FORM,
            parent=parent,
            error_bound=EXACT_ERROR,
            detail=f"sd of {n} normal readings: sigma sqrt(chi-square({df}) / {df})",
            support=(0.0, math.inf),
            _cdf=lambda x: _floats(special.gammainc(half, df * (np.maximum(x, 0.0) / sigma) ** 2 / 2.0)),
            _sf=lambda x: _floats(special.gammaincc(half, df * (np.maximum(x, 0.0) / sigma) ** 2 / 2.0)),
            _ppf=lambda q: sigma * np.sqrt(2.0 * _floats(special.gammaincinv(half, q)) / df),
            _isf=lambda q: sigma * np.sqrt(2.0 * _floats(special.gammainccinv(half, q)) / df),
            _tail=tail,
        )
    if n == 2:
        return _scaled(law_of_range(parent, 2), 1.0 / math.sqrt(2.0), "sd of 2 = range / sqrt 2")
    simulation = SdSimulation(parent, n)

    def evaluate(s: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        return _keep_precise(*simulation.evaluate(s), limit=SD_PRECISION)

    sd = parent.sd()
    nodes = np.concatenate(
        [
            np.geomspace(1e-3 * sd, 0.02 * sd, 14),
            np.linspace(0.0, 4.0 * sd, 161),
            np.linspace(4.0 * sd, 16.0 * sd, 97),
        ]
    )
    grid, precision, numeric = tabulate(evaluate, nodes, support=(0.0, math.inf), tolerance=1e-4, rounds=3)
    table, interpolation, relative = build_table(grid, support=(0.0, math.inf))
    absolute = max(_simulation_absolute(simulation, sd), numeric)
    return TabulatedLaw(
        method=SIMULATION,
        parent=parent,
        error_bound=absolute + interpolation,
        detail=(
            f"sd of {n}: last reading integrated exactly, first {n - 1} by scrambled Sobol points "
            f"({simulation.points} x {simulation.replicates} scramblings, seeded) and, for the "
            f"tails, {len(simulation.rungs)} importance-sampling proposals "
            f"({simulation.rung_points} x {simulation.replicates} each)"
        ),
        table=table,
        relative_error=precision + relative,
        tail_floor=_table_floor(table),
    )


def _simulation_absolute(simulation: SdSimulation, sd: float) -> float:
    """Three standard errors of the CDF, the largest over a grid (absolute bound, statistical)."""
    s = np.linspace(0.05 * sd, 4.0 * sd, 41)
    log_cdf, log_sf, _, rel = simulation.evaluate(s)
    with np.errstate(invalid="ignore", over="ignore"):
        value = np.minimum(np.exp(log_cdf), np.exp(log_sf))
        product = np.where(np.isfinite(rel) & np.isfinite(value), rel * value, 0.0)
    return float(np.max(product))


def _scaled(base: ExactLaw | TabulatedLaw, scale: float, detail: str) -> ExactLaw | TabulatedLaw:
    if isinstance(base, ExactLaw):
        return ExactLaw(
            method=base.method,
            parent=base.parent,
            error_bound=base.error_bound,
            detail=f"{detail}; {base.detail}",
            support=(base.support[0] * scale, base.support[1] * scale),
            _cdf=lambda x: base.cdf(x / scale),
            _sf=lambda x: base.sf(x / scale),
            _ppf=lambda q: scale * base.ppf(q),
            _isf=lambda q: scale * base.isf(q),
            _tail=lambda x, upper: base.tail(x / scale, upper=upper),
        )
    table = base.table
    scaled = Table(
        table.x * scale,
        table.log_cdf,
        table.log_sf,
        table.pdf / scale,
        support=(table.support[0] * scale, table.support[1] * scale),
    )
    return TabulatedLaw(
        method=base.method,
        parent=base.parent,
        error_bound=base.error_bound,
        detail=f"{detail}; {base.detail}",
        table=scaled,
        relative_error=base.relative_error,
        tail_floor=base.tail_floor,
    )


# ---------------------------------------------------------------- limits and alarm rates


def probability_limits(
    law: Law, *, lower_tail: float = 0.00135, upper_tail: float = 0.00135
) -> tuple[float, float]:
    """Control limits with the given in-control tail probabilities: (ppf(lower), isf(upper)).

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> low, high = probability_limits(law_of_mean(Parent.of("normal", mean=0.0, sd=1.0), 1))
        >>> round(low, 4), round(high, 4)
        (-3.0, 3.0)
    """
    for name, value in (("lower_tail", lower_tail), ("upper_tail", upper_tail)):
        number = _number(name, value)
        if not 0.0 < number < 0.5:
            raise ConfigError(f"{name} must be a probability in (0, 0.5), got {value!r}")
    return float(law.ppf(lower_tail)), float(law.isf(upper_tail))


def true_false_alarm_rate(parent: Parent, n: int, *, limit_sigma: float = 3.0) -> tuple[float, float]:
    """P(mean below the normal-theory LCL), P(mean above the UCL) for means of ``n`` readings.

    The limits are ``mean -/+ limit_sigma * sd / sqrt(n)`` of the parent; the probabilities
    come from the parent's exact law of the mean.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> low, high = true_false_alarm_rate(Parent.of("normal", mean=5.0, sd=2.0), 4)
        >>> round(low, 6), round(high, 6)
        (0.00135, 0.00135)
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 1)
    width = _number("limit_sigma", limit_sigma)
    if width <= 0:
        raise ConfigError(f"limit_sigma must be positive, got {limit_sigma!r}")
    law = _DEFAULT_CACHE.mean(parent, n)
    half = width * parent.sd() / math.sqrt(n)
    return law.tail(parent.mean() - half, upper=False), law.tail(parent.mean() + half, upper=True)


def standardized_mean_cdf(
    parent: Parent,
    n: int,
    *,
    shift: float = 0.0,
    mean: float | None = None,
    sd: float | None = None,
) -> Callable[[FloatArray], FloatArray]:
    """CDF of ``z = (xbar - mean) / (sd / sqrt n)`` when the process mean has moved by ``shift`` sds.

    ``mean`` and ``sd`` are the parent's (in-control) values unless given (a chart's standard
    values, which it standardizes with); ``shift`` is in sds of single
    readings, so the standardized point moves by ``shift * sqrt(n)``. The shape of the law is
    kept (a pure location shift of the process). This is the input the run-length chains of
    :mod:`monitor.spc.arl` take.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> cdf = standardized_mean_cdf(Parent.of("normal", mean=10.0, sd=2.0), 4, shift=0.5)
        >>> round(float(cdf(np.array([1.0]))[0]), 6)  # Phi(1 - 0.5 * 2)
        0.5
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 1)
    move = _number("shift", shift)
    law = _DEFAULT_CACHE.mean(parent, n)
    center = parent.mean() if mean is None else _number("mean", mean)
    spread = parent.sd() if sd is None else _number("sd", sd)
    scale = spread / math.sqrt(n)
    offset = move * spread

    def cdf(z: FloatArray) -> FloatArray:
        return law.cdf(center + np.asarray(z, dtype=np.float64) * scale - offset)

    return cdf


# ---------------------------------------------------------------- the cache


class LawCache:
    """Laws built once per (statistic, parent, n, options, limits version); least recently used out.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> cache = LawCache(maxsize=4)
        >>> p = Parent.of("normal", mean=0.0, sd=1.0)
        >>> cache.mean(p, 5) is cache.mean(p, 5)
        True
        >>> len(cache), cache.hits, cache.misses
        (1, 1, 1)
    """

    def __init__(self, maxsize: int = 128) -> None:
        if isinstance(maxsize, bool) or not isinstance(maxsize, int) or maxsize < 1:
            raise ConfigError(f"LawCache maxsize must be a positive integer, got {maxsize!r}")
        self.maxsize = maxsize
        self._laws: OrderedDict[tuple[object, ...], Law] = OrderedDict()
        self.hits = 0
        self.misses = 0

    def __len__(self) -> int:
        """Number of laws held."""
        return len(self._laws)

    def clear(self) -> None:
        """Forget every law."""
        self._laws.clear()

    def _get(self, key: tuple[object, ...], build: Callable[[], Law]) -> Law:
        law = self._laws.get(key)
        if law is not None:
            self.hits += 1
            self._laws.move_to_end(key)
            return law
        self.misses += 1
        law = build()
        self._laws[key] = law
        if len(self._laws) > self.maxsize:
            self._laws.popitem(last=False)
        return law

    def mean(self, parent: Parent, n: int, *, version: object = None) -> Law:
        """The law of the mean of n readings."""
        return self._get(("mean", parent, n, version), lambda: law_of_mean(parent, n))

    def range(self, parent: Parent, n: int, *, version: object = None) -> Law:
        """The law of the range of n readings."""
        return self._get(("range", parent, n, version), lambda: law_of_range(parent, n))

    def sd(self, parent: Parent, n: int, *, version: object = None) -> Law:
        """The law of the sd of n readings."""
        return self._get(("sd", parent, n, version), lambda: law_of_sd(parent, n))

    def ewma(
        self,
        parent: Parent,
        n: int,
        smoothing: float,
        *,
        t: int | None = None,
        start: float | None = None,
        version: object = None,
    ) -> Law:
        """The law of the EWMA (steady state once its variance has settled to 1e-12)."""
        if (
            t is not None
            and (1.0 - smoothing) ** (2 * t) < 1e-12
            and (start is None or start == parent.mean())
        ):
            t = None
        return self._get(
            ("ewma", parent, n, smoothing, t, start, version),
            lambda: law_of_ewma(parent, n, smoothing, t=t, start=start),
        )


_DEFAULT_CACHE = LawCache()


# ---------------------------------------------------------------- p-values of signals


@dataclass(frozen=True, slots=True)
class SignalPValue:
    """A p-value, how it was obtained, and under which in-control model.

    Attributes:
        value: the probability, in control, of what the signal reports (None if not computed).
        method: how (closed form, convolution, numerical integration, ...).
        parent: the parent model, as text.
        error_bound: bound on the absolute error of ``value`` where stated.
    """

    value: float | None
    method: str
    parent: str
    error_bound: float | None = None


_DEFAULT_RULES: Final = {
    RuleId.OUTER_ZONE_CLUSTER: Rule.outer_zone_cluster(),
    RuleId.MIDDLE_ZONE_CLUSTER: Rule.middle_zone_cluster(),
    RuleId.SAME_SIDE_RUN: Rule.same_side_run(),
    RuleId.STEADY_TREND: Rule.steady_trend(),
    RuleId.ALTERNATING_RUN: Rule.alternating_run(),
    RuleId.HUGGING_CENTER: Rule.hugging_center(),
    RuleId.AVOIDING_CENTER: Rule.avoiding_center(),
}


def _law_for(
    signal: Signal,
    parent: Parent,
    n: int,
    smoothing: float | None,
    t: int | None,
    cache: LawCache,
    version: object,
) -> Law:
    statistic = signal.statistic
    if statistic is Statistic.MEAN:
        return cache.mean(parent, n, version=version)
    if statistic is Statistic.INDIVIDUAL:
        return cache.mean(parent, 1, version=version)
    if statistic is Statistic.RANGE:
        return cache.range(parent, n, version=version)
    if statistic is Statistic.MOVING_RANGE:
        # n is the span; an individuals chart's n of 1 means the usual span of 2
        return cache.range(parent, max(n, 2), version=version)
    if statistic is Statistic.SD:
        return cache.sd(parent, n, version=version)
    if statistic is Statistic.EWMA:
        if smoothing is None:
            raise ConfigError("signal_p_value: an EWMA signal needs smoothing (the chart's lambda)")
        return cache.ewma(parent, n, smoothing, t=t, start=signal.center, version=version)
    raise ConfigError(f"signal_p_value: no law for statistic {statistic.value!r}")  # pragma: no cover


def _zone_sigma(signal: Signal, limit_sigma: float) -> float:
    """The sigma of the plotted point behind the chart's zones (from its limits or its z)."""
    if signal.upper is not None and math.isfinite(signal.upper) and signal.upper > signal.center:
        return (signal.upper - signal.center) / limit_sigma
    if signal.lower is not None and math.isfinite(signal.lower) and signal.lower < signal.center:
        return (signal.center - signal.lower) / limit_sigma
    if signal.z is not None and signal.z != 0:
        return (signal.value - signal.center) / signal.z
    raise ConfigError("signal_p_value: the signal has neither limits nor z to place its zones")


def zone_probabilities(law: Law, center: float, sigma: float, line: float) -> tuple[float, float]:
    """P(point > center + line sigma), P(point < center - line sigma) under the law."""
    return law.tail(center + line * sigma, upper=True), law.tail(center - line * sigma, upper=False)


def _pattern(rule: Rule, law: Law, center: float, sigma: float) -> tuple[float, str]:
    """Probability that the rule's pattern completes at a given point, zones from the law."""
    rid = rule.id
    if rid in (RuleId.STEADY_TREND, RuleId.ALTERNATING_RUN):
        return pattern_probability(rule), "closed form (ranks: the same for every continuous law)"
    how = f"closed form from the zone probabilities of the in-control law ({law.method})"
    if rid is RuleId.SAME_SIDE_RUN:
        above, below = zone_probabilities(law, center, sigma, 0.0)
        return above**rule.length + below**rule.length, how
    above, below = zone_probabilities(law, center, sigma, rule.sigma)
    if rid in (RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER):
        # the newest point beyond the line, and at least count - 1 of the window's others
        value = 0.0
        for q in (above, below):
            value += q * float(stats.binom.sf(rule.count - 2, rule.length - 1, q))
        return value, how
    if rid is RuleId.HUGGING_CENTER:
        return max(0.0, 1.0 - above - below) ** rule.length, how
    if rid is RuleId.AVOIDING_CENTER:
        return max(0.0, (above + below) ** rule.length - above**rule.length - below**rule.length), how
    raise ConfigError(f"signal_p_value: no pattern probability for rule {rid.value!r}")  # pragma: no cover


def signal_p_value(
    signal: Signal,
    *,
    parent: Parent,
    n: int,
    rules: tuple[Rule, ...] = (),
    limit_sigma: float = 3.0,
    smoothing: float | None = None,
    t: int | None = None,
    cache: LawCache | None = None,
    version: object = None,
) -> SignalPValue:
    """The p-value of one signal under the parent model (generalises ``pvalues.p_value``).

    * a point beyond its limits (means, individuals, ranges, moving ranges, sds, EWMA): the
      probability, in control, of the statistic lying beyond the observed value on the
      signal's side, from the statistic's law (values in process units, against the parent);
    * a run rule: the probability that its pattern completes at a given point, with the zone
      probabilities taken from the in-control law of the plotted point and the chart's zone
      lines (``center +/- k * sigma``, sigma from its limits); trends and alternations depend
      on ranks only (the same for every continuous law);
    * CUSUM: left to the run-length module (value None);
    * p and u charts: the normal approximation of ``monitor.spc.pvalues`` (readings' parent
      models do not apply to counts).

    Args:
        signal: the signal.
        parent: in-control model of single readings, in the chart's units.
        n: readings per subgroup (for moving ranges the span; 1 is taken as the usual 2).
        rules: the chart's rules (for run-rule parameters; classical defaults otherwise).
        limit_sigma: where the chart's limits are, in sigma of the plotted point.
        smoothing: the EWMA's lambda (EWMA signals only).
        t: for EWMA signals, subgroups since the start (None: steady state).
        cache: where laws are kept (a shared default otherwise).
        version: part of the cache key, e.g. the chart's limits version.
    """
    parent = _parent(parent)
    n = _count("n (subgroup size)", n, 1)
    cache = _DEFAULT_CACHE if cache is None else cache
    described = parent.describe()
    statistic = signal.statistic
    if statistic in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER):
        return SignalPValue(None, CUSUM_METHOD, described)
    if statistic in (Statistic.PROPORTION, Statistic.RATE):
        result = normal_p_value(signal, n=n, rules=rules, limit_sigma=limit_sigma)
        return SignalPValue(result.value, result.method, "counts (the parent of readings does not apply)")
    law = _law_for(signal, parent, n, smoothing, t, cache, version)
    if signal.rule is RuleId.BEYOND_LIMITS:
        upper = signal.side is not Side.LOWER
        return SignalPValue(law.tail(signal.value, upper=upper), law.method, described, law.error_bound)
    rule = next((r for r in rules if r.id is signal.rule), None) or _DEFAULT_RULES[signal.rule]
    sigma = _zone_sigma(signal, _number("limit_sigma", limit_sigma))
    value, how = _pattern(rule, law, signal.center, sigma)
    return SignalPValue(min(1.0, value), how, described, law.error_bound)
