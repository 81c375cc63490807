"""Parent models: the in-control distribution of single readings.

A :class:`Parent` names a family and its parameters; the laws of chart statistics
(:mod:`monitor.spc.laws`) are derived from it. The families and their parameters:

==============  ======================  ====================================================
name            parameters              meaning
==============  ======================  ====================================================
normal          mean, sd                mean and standard deviation
lognormal       log_mean, log_sd        mean and standard deviation of the natural logarithm
                                        of the readings (median ``exp(log_mean)``)
gamma           shape, scale            density ``x**(shape - 1) exp(-x / scale)``
exponential     mean                    the mean (a gamma law of shape 1)
weibull         shape, scale            ``P(X > x) = exp(-(x / scale)**shape)``
uniform         low, high               the interval
triangular      low, mode, high         the corners of the density
empirical       (built from data)       a smoothed density of a baseline sample
==============  ======================  ====================================================

The lognormal, gamma, exponential and Weibull families start at zero (no location
parameter): a three-parameter fit is ill-posed for baselines of the usual size.

Text form, read by :func:`parse_parent` and written by :meth:`Parent.describe`:
``"triangular(low=0, mode=16, high=32)"`` or ``"triangular:low=0,mode=16,high=32"``.

The empirical parent (:func:`empirical`) is a density of our own construction, chosen so that
the laws of chart statistics derived from it are exact:

* body: a Gaussian kernel density estimate with Silverman's rule-of-thumb bandwidth
  ``b = 0.9 min(sd, IQR / 1.349) N**(-1/5)`` (Silverman 1986, *Density Estimation*, eq. 3.31),
  binned on a lattice of step ``h = b / 4`` (linear binning, which keeps the mean);
* tails: beyond the ``k = max(5, ceil(sqrt(N)))``-th most extreme reading on each side the
  model holds the fraction ``k / N`` of the mass, decaying exponentially with the scale
  ``beta`` = mean excess of the ``k`` readings beyond that threshold (the maximum likelihood
  estimate for exponential excesses; on the lattice, geometric weights). Why exponential:
  excesses over a high threshold are approximately generalized Pareto
  (Pickands-Balkema-de Haan); for the normal, lognormal, gamma and Weibull families the shape
  of that law is 0, the exponential case. Estimating the shape from a baseline of a few
  hundred readings is too noisy to be useful, so we fix it at 0. This is heavier than the
  Gaussian tail a kernel estimate would give beyond the data (so readings beyond the data do
  not get p-values that are too small) and lighter than a power law (a process with a
  truly heavy tail needs a parametric parent). Each tail stops where its weights fall below
  ``1e-30`` of its first: beyond that the model has no mass. The tails are two-sided even for
  readings that cannot be negative: the model may give a small probability below zero;
* smoothing: the density is the lattice weights times a cubic B-spline of width ``4 h``
  (variance ``h**2 / 3``), so it is twice continuously differentiable, and the mean of ``n``
  readings is exactly a lattice law plus an Irwin-Hall law of ``4 n`` uniforms.

Examples:
    >>> parent = parse_parent("triangular:low=0,mode=16,high=32")
    >>> parent.describe()
    'triangular(low=0, mode=16, high=32)'
    >>> round(parent.mean(), 3), round(parent.sd(), 3)
    (16.0, 6.532)
    >>> round(float(parent.sf(18.0)), 4)
    0.3828
    >>> parse_parent("normal(mean=16, sd=6)") == Parent.of("normal", mean=16.0, sd=6.0)
    True
"""

from __future__ import annotations

import hashlib
import math
import numbers
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Final, NamedTuple, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, special

from monitor.spc._state import check_header, get_float, get_float_list, get_str, header
from monitor.spc.errors import ConfigError, NotEnoughData, StateError
from monitor.spc.types import State

__all__ = [
    "DEFAULT_CANDIDATES",
    "FAMILIES",
    "Candidate",
    "EmpiricalGrid",
    "FitReport",
    "Parent",
    "empirical",
    "fit_parent",
    "parse_parent",
]

FloatArray = NDArray[np.float64]

FAMILIES: Final[dict[str, tuple[str, ...]]] = {
    "normal": ("mean", "sd"),
    "lognormal": ("log_mean", "log_sd"),
    "gamma": ("shape", "scale"),
    "exponential": ("mean",),
    "weibull": ("shape", "scale"),
    "uniform": ("low", "high"),
    "triangular": ("low", "mode", "high"),
}
"""The analytic families and their parameter names, in their written order."""

EMPIRICAL: Final = "empirical"
EMPIRICAL_MIN_READINGS: Final = 20
"""The fewest readings :func:`empirical` accepts."""
LATTICE_MAX_CELLS: Final = 4000
"""The body of an empirical lattice never has more cells than this (bounded snapshots)."""
_WEIGHT_FLOOR: Final = 1e-30
_SCHEMA: Final = 1
_SQRT2PI: Final = math.sqrt(2.0 * math.pi)

DEFAULT_CANDIDATES: Final = ("normal", "lognormal", "gamma", "weibull")
"""The families :func:`fit_parent` tries unless told otherwise."""
_FITTABLE: Final = ("normal", "lognormal", "gamma", "weibull", "exponential", "uniform")


def _floats(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


# ---------------------------------------------------------------- the models behind the names


class _Model(Protocol):
    """The functions of one family with its parameters (vectorised)."""

    low: float
    high: float
    kinks: tuple[float, ...]

    def mean(self) -> float: ...
    def variance(self) -> float: ...
    def cdf(self, x: FloatArray) -> FloatArray: ...
    def sf(self, x: FloatArray) -> FloatArray: ...
    def pdf(self, x: FloatArray) -> FloatArray: ...
    def logpdf(self, x: FloatArray) -> FloatArray: ...
    def ppf(self, q: FloatArray) -> FloatArray: ...
    def isf(self, q: FloatArray) -> FloatArray: ...


class _Normal:
    kinks: tuple[float, ...] = ()

    def __init__(self, mean: float, sd: float) -> None:
        self.mu, self.sigma = mean, sd
        self.low, self.high = -math.inf, math.inf

    def mean(self) -> float:
        return self.mu

    def variance(self) -> float:
        return self.sigma**2

    def cdf(self, x: FloatArray) -> FloatArray:
        return _floats(special.ndtr((x - self.mu) / self.sigma))

    def sf(self, x: FloatArray) -> FloatArray:
        return _floats(special.ndtr((self.mu - x) / self.sigma))

    def logpdf(self, x: FloatArray) -> FloatArray:
        z = (x - self.mu) / self.sigma
        return -0.5 * z * z - math.log(self.sigma * _SQRT2PI)

    def pdf(self, x: FloatArray) -> FloatArray:
        return np.exp(self.logpdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        return self.mu + self.sigma * _floats(special.ndtri(q))

    def isf(self, q: FloatArray) -> FloatArray:
        return self.mu - self.sigma * _floats(special.ndtri(q))


class _Lognormal:
    kinks: tuple[float, ...] = ()

    def __init__(self, log_mean: float, log_sd: float) -> None:
        self.mu, self.sigma = log_mean, log_sd
        self.low, self.high = 0.0, math.inf

    def mean(self) -> float:
        return math.exp(self.mu + 0.5 * self.sigma**2)

    def variance(self) -> float:
        s2 = self.sigma**2
        return math.expm1(s2) * math.exp(2.0 * self.mu + s2)

    def _z(self, x: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return (np.log(np.maximum(x, 0.0)) - self.mu) / self.sigma

    def cdf(self, x: FloatArray) -> FloatArray:
        return _floats(special.ndtr(self._z(x)))

    def sf(self, x: FloatArray) -> FloatArray:
        return _floats(special.ndtr(-self._z(x)))

    def logpdf(self, x: FloatArray) -> FloatArray:
        z = self._z(x)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = -0.5 * z * z - np.log(x * self.sigma * _SQRT2PI)
        return np.where(x > 0, out, -np.inf)

    def pdf(self, x: FloatArray) -> FloatArray:
        return np.exp(self.logpdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        return np.exp(self.mu + self.sigma * _floats(special.ndtri(q)))

    def isf(self, q: FloatArray) -> FloatArray:
        return np.exp(self.mu - self.sigma * _floats(special.ndtri(q)))


class _Gamma:
    kinks: tuple[float, ...] = ()

    def __init__(self, shape: float, scale: float) -> None:
        self.shape, self.scale = shape, scale
        self.low, self.high = 0.0, math.inf
        self._log_norm = float(special.gammaln(shape)) + math.log(scale)

    def mean(self) -> float:
        return self.shape * self.scale

    def variance(self) -> float:
        return self.shape * self.scale**2

    def cdf(self, x: FloatArray) -> FloatArray:
        return _floats(special.gammainc(self.shape, np.maximum(x, 0.0) / self.scale))

    def sf(self, x: FloatArray) -> FloatArray:
        return _floats(special.gammaincc(self.shape, np.maximum(x, 0.0) / self.scale))

    def logpdf(self, x: FloatArray) -> FloatArray:
        y = np.maximum(x, 0.0) / self.scale
        with np.errstate(divide="ignore", invalid="ignore"):
            out = _floats(special.xlogy(self.shape - 1.0, y)) - y - self._log_norm
        return np.where(x >= 0, out, -np.inf)

    def pdf(self, x: FloatArray) -> FloatArray:
        return np.exp(self.logpdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        return self.scale * _floats(special.gammaincinv(self.shape, q))

    def isf(self, q: FloatArray) -> FloatArray:
        return self.scale * _floats(special.gammainccinv(self.shape, q))


class _Weibull:
    kinks: tuple[float, ...] = ()

    def __init__(self, shape: float, scale: float) -> None:
        self.shape, self.scale = shape, scale
        self.low, self.high = 0.0, math.inf

    def mean(self) -> float:
        return self.scale * math.gamma(1.0 + 1.0 / self.shape)

    def variance(self) -> float:
        g1 = math.gamma(1.0 + 1.0 / self.shape)
        g2 = math.gamma(1.0 + 2.0 / self.shape)
        return self.scale**2 * (g2 - g1 * g1)

    def _power(self, x: FloatArray) -> FloatArray:
        return np.power(np.maximum(x, 0.0) / self.scale, self.shape)

    def cdf(self, x: FloatArray) -> FloatArray:
        return -np.expm1(-self._power(x))

    def sf(self, x: FloatArray) -> FloatArray:
        return np.exp(-self._power(x))

    def logpdf(self, x: FloatArray) -> FloatArray:
        y = np.maximum(x, 0.0) / self.scale
        with np.errstate(divide="ignore", invalid="ignore"):
            out = (
                math.log(self.shape / self.scale)
                + _floats(special.xlogy(self.shape - 1.0, y))
                - np.power(y, self.shape)
            )
        return np.where(x >= 0, out, -np.inf)

    def pdf(self, x: FloatArray) -> FloatArray:
        return np.exp(self.logpdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        return self.scale * np.power(-np.log1p(-q), 1.0 / self.shape)

    def isf(self, q: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return self.scale * np.power(-np.log(q), 1.0 / self.shape)


class _Uniform:
    def __init__(self, low: float, high: float) -> None:
        self.low, self.high = low, high
        self.kinks: tuple[float, ...] = (low, high)

    def mean(self) -> float:
        return 0.5 * (self.low + self.high)

    def variance(self) -> float:
        return (self.high - self.low) ** 2 / 12.0

    def cdf(self, x: FloatArray) -> FloatArray:
        return np.clip((x - self.low) / (self.high - self.low), 0.0, 1.0)

    def sf(self, x: FloatArray) -> FloatArray:
        return np.clip((self.high - x) / (self.high - self.low), 0.0, 1.0)

    def pdf(self, x: FloatArray) -> FloatArray:
        inside = (x >= self.low) & (x <= self.high)
        return np.where(inside, 1.0 / (self.high - self.low), 0.0)

    def logpdf(self, x: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return np.log(self.pdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        return self.low + q * (self.high - self.low)

    def isf(self, q: FloatArray) -> FloatArray:
        return self.high - q * (self.high - self.low)


class _Triangular:
    def __init__(self, low: float, mode: float, high: float) -> None:
        self.low, self.mode, self.high = low, mode, high
        self.kinks: tuple[float, ...] = (low, mode, high)
        self._width = high - low

    def mean(self) -> float:
        return (self.low + self.mode + self.high) / 3.0

    def variance(self) -> float:
        a, c, b = self.low, self.mode, self.high
        return (a * a + b * b + c * c - a * b - a * c - b * c) / 18.0

    def cdf(self, x: FloatArray) -> FloatArray:
        a, c, b = self.low, self.mode, self.high
        xc = np.clip(x, a, b)
        with np.errstate(divide="ignore", invalid="ignore"):
            left = (xc - a) ** 2 / (self._width * (c - a))
            # 1 - (b - x)^2 / (w (b - c)) written as a sum of non-negative terms (no cancellation
            # when the mode is at or near the low end)
            right = ((b - c) * (c - a) + (xc - c) * (2.0 * b - c - xc)) / (self._width * (b - c))
        return np.where(xc <= c, np.where(xc > a, left, 0.0), np.where(xc < b, right, 1.0))

    def sf(self, x: FloatArray) -> FloatArray:
        a, c, b = self.low, self.mode, self.high
        xc = np.clip(x, a, b)
        with np.errstate(divide="ignore", invalid="ignore"):
            left = ((c - a) * (b - c) + (c - xc) * (xc + c - 2.0 * a)) / (self._width * (c - a))
            right = (b - xc) ** 2 / (self._width * (b - c))
        return np.where(xc >= c, np.where(xc < b, right, 0.0), np.where(xc > a, left, 1.0))

    def pdf(self, x: FloatArray) -> FloatArray:
        a, c, b = self.low, self.mode, self.high
        with np.errstate(divide="ignore", invalid="ignore"):
            up = 2.0 * (x - a) / (self._width * (c - a))
            down = 2.0 * (b - x) / (self._width * (b - c))
        out = np.where(x < c, up, down)
        out = np.where(x == c, 2.0 / self._width, out)
        return np.where((x >= a) & (x <= b), out, 0.0)

    def logpdf(self, x: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return np.log(self.pdf(x))

    def ppf(self, q: FloatArray) -> FloatArray:
        a, c, b = self.low, self.mode, self.high
        w = self._width
        split = (c - a) / w
        left = a + np.sqrt(np.maximum(q, 0.0) * w * (c - a))
        # b - sqrt((1 - q) w (b - c)) as c + (b - c)(q w - (c - a)) / ((b - c) + sqrt(...)):
        # no cancellation for small q when the mode is at the low end
        root = np.sqrt(np.maximum(1.0 - q, 0.0) * w * (b - c))
        with np.errstate(divide="ignore", invalid="ignore"):
            right = c + (b - c) * (q * w - (c - a)) / ((b - c) + root)
        return np.where(q <= split, left, np.where(b > c, right, b))

    def isf(self, q: FloatArray) -> FloatArray:
        a, c, b = self.low, self.mode, self.high
        w = self._width
        split = (b - c) / w
        right = b - np.sqrt(np.maximum(q, 0.0) * w * (b - c))
        root = np.sqrt(np.maximum(1.0 - q, 0.0) * w * (c - a))
        with np.errstate(divide="ignore", invalid="ignore"):
            left = c - (c - a) * (q * w - (b - c)) / ((c - a) + root)
        return np.where(q <= split, right, np.where(c > a, left, a))


# ---------------------------------------------------------------- the empirical lattice


def _spline_cdf(s: FloatArray) -> FloatArray:
    """P(V <= s) for V with the centered cubic B-spline density on [-2, 2] (sum of 4 uniforms)."""
    a = np.abs(s)
    outer = (2.0 - np.minimum(a, 2.0)) ** 4 / 24.0  # mass beyond |s| for 1 <= |s| <= 2
    inner = 0.5 - (2.0 * a / 3.0 - a**3 / 3.0 + a**4 / 8.0)  # mass beyond |s| for |s| <= 1
    beyond = np.where(a >= 1.0, outer, inner)
    return np.where(s >= 0, 1.0 - beyond, beyond)


def _spline_sf(s: FloatArray) -> FloatArray:
    return _spline_cdf(-s)


def _spline_pdf(s: FloatArray) -> FloatArray:
    a = np.abs(s)
    inner = 2.0 / 3.0 - a * a + a**3 / 2.0
    outer = (2.0 - np.minimum(a, 2.0)) ** 3 / 6.0
    return np.where(a < 1.0, inner, outer)


@dataclass(frozen=True, eq=False)
class EmpiricalGrid:
    """The lattice of an empirical parent: density ``sum_k w_k B((x - origin) / step - k) / step``.

    ``B`` is the centered cubic B-spline (the density of a sum of 4 uniforms on ``[-1/2, 1/2]``),
    so cell ``k`` spreads its weight over ``[origin + (k - 2) step, origin + (k + 2) step]``.
    Equality and hashing go by content (a digest of the weights).

    Examples:
        >>> grid = EmpiricalGrid(0.0, 1.0, np.array([0.25, 0.5, 0.25]))
        >>> round(grid.mean(), 6), round(grid.variance(), 6)
        (1.0, 0.833333)
    """

    origin: float
    step: float
    weights: FloatArray
    _prefix: FloatArray = field(init=False, repr=False)
    _suffix: FloatArray = field(init=False, repr=False)
    _digest: str = field(init=False, repr=False)

    def __post_init__(self) -> None:
        w = np.array(self.weights, dtype=np.float64)
        if w.ndim != 1 or w.shape[0] < 1 or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise ConfigError("empirical grid weights must be a non-empty list of non-negative numbers")
        if not (math.isfinite(self.origin) and math.isfinite(self.step) and self.step > 0):
            raise ConfigError("empirical grid origin must be finite and its step positive")
        total = float(w.sum())
        if abs(total - 1.0) > 1e-12:  # weights already summing to one are kept bit for bit
            w = w / total
        w.setflags(write=False)
        object.__setattr__(self, "weights", w)
        prefix = np.concatenate([[0.0], np.cumsum(w)])
        suffix = np.concatenate([np.cumsum(w[::-1])[::-1], [0.0]])
        object.__setattr__(self, "_prefix", prefix)
        object.__setattr__(self, "_suffix", suffix)
        digest = hashlib.blake2b(w.tobytes(), digest_size=16)
        digest.update(np.array([self.origin, self.step]).tobytes())
        object.__setattr__(self, "_digest", digest.hexdigest())

    def __eq__(self, other: object) -> bool:
        """Same origin, step and weights."""
        return isinstance(other, EmpiricalGrid) and self._digest == other._digest

    def __hash__(self) -> int:
        """Hash of the content digest."""
        return hash(self._digest)

    @property
    def cells(self) -> int:
        """Number of lattice cells."""
        return int(self.weights.shape[0])

    @property
    def low(self) -> float:
        """Lower end of the support."""
        return self.origin - 2.0 * self.step

    @property
    def high(self) -> float:
        """Upper end of the support."""
        return self.origin + (self.cells + 1) * self.step

    def mean(self) -> float:
        """Mean of the density."""
        k = np.arange(self.cells, dtype=np.float64)
        return self.origin + self.step * float(np.dot(k, self.weights))

    def variance(self) -> float:
        """Variance: lattice variance plus the spline's ``step**2 / 3``."""
        k = np.arange(self.cells, dtype=np.float64)
        m = float(np.dot(k, self.weights))
        var = float(np.dot((k - m) ** 2, self.weights))
        return self.step**2 * (var + 1.0 / 3.0)

    def _locate(self, x: FloatArray) -> tuple[NDArray[np.int64], FloatArray]:
        u = (x - self.origin) / self.step
        u = np.clip(u, -3.0, self.cells + 2.0)
        j = np.floor(u).astype(np.int64)
        return j, u

    def cdf(self, x: FloatArray) -> FloatArray:
        """P(X <= x): whole cells below plus the four overlapping ones."""
        j, u = self._locate(x)
        idx = np.clip(j - 1, 0, self.cells)
        out = self._prefix[idx].copy()
        for off in (-1, 0, 1, 2):
            k = j + off
            ok = (k >= 0) & (k < self.cells)
            kk = np.clip(k, 0, self.cells - 1)
            out += np.where(ok, self.weights[kk] * _spline_cdf(u - kk), 0.0)
        return np.clip(out, 0.0, 1.0)

    def sf(self, x: FloatArray) -> FloatArray:
        """P(X > x): whole cells above plus the four overlapping ones."""
        j, u = self._locate(x)
        idx = np.clip(j + 3, 0, self.cells)
        out = self._suffix[idx].copy()
        for off in (-1, 0, 1, 2):
            k = j + off
            ok = (k >= 0) & (k < self.cells)
            kk = np.clip(k, 0, self.cells - 1)
            out += np.where(ok, self.weights[kk] * _spline_sf(u - kk), 0.0)
        return np.clip(out, 0.0, 1.0)

    def pdf(self, x: FloatArray) -> FloatArray:
        """The density."""
        j, u = self._locate(x)
        out = np.zeros(np.shape(u))
        for off in (-1, 0, 1, 2):
            k = j + off
            ok = (k >= 0) & (k < self.cells)
            kk = np.clip(k, 0, self.cells - 1)
            out += np.where(ok, self.weights[kk] * _spline_pdf(u - kk), 0.0)
        return out / self.step


class _Lattice:
    def __init__(self, grid: EmpiricalGrid) -> None:
        self.grid = grid
        self.low, self.high = grid.low, grid.high
        self.kinks: tuple[float, ...] = ()
        self._table: tuple[FloatArray, FloatArray, FloatArray] | None = None

    def mean(self) -> float:
        return self.grid.mean()

    def variance(self) -> float:
        return self.grid.variance()

    def cdf(self, x: FloatArray) -> FloatArray:
        return self.grid.cdf(x)

    def sf(self, x: FloatArray) -> FloatArray:
        return self.grid.sf(x)

    def pdf(self, x: FloatArray) -> FloatArray:
        return self.grid.pdf(x)

    def logpdf(self, x: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return np.log(self.grid.pdf(x))

    def _knots(self) -> tuple[FloatArray, FloatArray, FloatArray]:
        if self._table is None:
            g = self.grid
            x = g.origin + g.step * np.arange(-2.0, g.cells + 1.0, 0.25)
            with np.errstate(divide="ignore"):
                self._table = (x, np.log(g.cdf(x)), np.log(g.sf(x)))
        return self._table

    def _invert(self, q: FloatArray, *, upper: bool) -> FloatArray:
        # interpolate x against the log tail on a fine grid, then polish by Newton steps
        x, log_cdf, log_sf = self._knots()
        with np.errstate(divide="ignore"):
            target = np.log(q)
        if upper:
            ok = np.isfinite(log_sf)
            guess = np.interp(-target, -log_sf[ok], x[ok])
        else:
            ok = np.isfinite(log_cdf)
            guess = np.interp(target, log_cdf[ok], x[ok])
        for _ in range(3):
            density = self.pdf(guess)
            value = self.sf(guess) if upper else self.cdf(guess)
            with np.errstate(divide="ignore", invalid="ignore"):
                step = (value - q) / density
            step = np.where(density > 0, step, 0.0)
            guess = guess + step if upper else guess - step
        return _floats(np.clip(guess, self.low, self.high))

    def ppf(self, q: FloatArray) -> FloatArray:
        return self._invert(q, upper=False)

    def isf(self, q: FloatArray) -> FloatArray:
        return self._invert(q, upper=True)


# ---------------------------------------------------------------- the parent


def _number_text(value: float) -> str:
    """Shortest text that reads back to the same float, without a trailing '.0'."""
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def _param_value(name: str, key: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ConfigError(f"{name}: {key} must be a number, got {value!r}")
    return float(value)


def _check_params(name: str, values: dict[str, float]) -> None:
    """Raise ConfigError unless the parameters are allowed for the family."""

    def positive(key: str) -> None:
        if not values[key] > 0:
            raise ConfigError(f"{name}: {key} must be a positive number, got {values[key]!r}")

    for key, value in values.items():
        if not math.isfinite(value):
            raise ConfigError(f"{name}: {key} must be a finite number, got {value!r}")
    if name == "normal":
        positive("sd")
    elif name == "lognormal":
        positive("log_sd")
    elif name in ("gamma", "weibull"):
        positive("shape")
        positive("scale")
    elif name == "exponential":
        positive("mean")
    elif name == "uniform":
        if not values["low"] < values["high"]:
            raise ConfigError(
                f"uniform: low must be below high, got low={values['low']}, high={values['high']}"
            )
    elif name == "triangular":
        a, c, b = values["low"], values["mode"], values["high"]
        if not (a <= c <= b and a < b):
            raise ConfigError(
                f"triangular: need low <= mode <= high and low < high, got low={a}, mode={c}, high={b}"
            )


def _build(name: str, v: dict[str, float], grid: EmpiricalGrid | None) -> _Model:
    if name == "normal":
        return _Normal(v["mean"], v["sd"])
    if name == "lognormal":
        return _Lognormal(v["log_mean"], v["log_sd"])
    if name == "gamma":
        return _Gamma(v["shape"], v["scale"])
    if name == "exponential":
        return _Gamma(1.0, v["mean"])
    if name == "weibull":
        return _Weibull(v["shape"], v["scale"])
    if name == "uniform":
        return _Uniform(v["low"], v["high"])
    if name == "triangular":
        return _Triangular(v["low"], v["mode"], v["high"])
    if grid is None:  # pragma: no cover - guarded in __post_init__
        raise ConfigError("empirical parent needs its grid")
    return _Lattice(grid)


_ALLOWED_NAMES = ", ".join(sorted(FAMILIES))


@dataclass(frozen=True, slots=True)
class Parent:
    """An in-control model of single readings: a family name and named parameters.

    Args:
        name: one of :data:`FAMILIES` or ``"empirical"``.
        params: ``(key, value)`` pairs, the family's keys (any order; stored in written order).
        grid: the lattice of an empirical parent (``None`` for the analytic families).

    Build analytic parents with :meth:`of` or :func:`parse_parent`, empirical ones with
    :func:`empirical`. Parents are immutable, hashable and compare by value.

    Examples:
        >>> p = Parent.of("gamma", shape=2.0, scale=3.0)
        >>> p.describe(), p.mean(), round(p.sd(), 4)
        ('gamma(shape=2, scale=3)', 6.0, 4.2426)
        >>> Parent.of("gamma", shape=-1.0, scale=3.0)
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: gamma: shape must be a positive number, got -1.0
    """

    name: str
    params: tuple[tuple[str, float], ...]
    grid: EmpiricalGrid | None = field(default=None, repr=False)
    _model: _Model = field(init=False, repr=False, compare=False, hash=False)

    def __post_init__(self) -> None:
        if self.name == EMPIRICAL:
            if self.grid is None:
                raise ConfigError("an empirical parent needs its grid: build it with empirical(sample)")
            values = {k: float(v) for k, v in self.params}
            object.__setattr__(self, "params", tuple((k, float(v)) for k, v in self.params))
        else:
            keys = FAMILIES.get(self.name)
            if keys is None:
                raise ConfigError(
                    f"unknown parent {self.name!r}; allowed: {_ALLOWED_NAMES} "
                    "(empirical parents are built from data with empirical(sample) or fit_parent)"
                )
            if self.grid is not None:
                raise ConfigError(f"{self.name}: only empirical parents carry a grid")
            given = dict(self.params)
            if len(given) != len(self.params):
                raise ConfigError(f"{self.name}: a parameter is given twice in {self.params!r}")
            unknown = sorted(set(given) - set(keys))
            missing = [k for k in keys if k not in given]
            if unknown or missing:
                raise ConfigError(
                    f"{self.name} takes parameters {', '.join(keys)}"
                    + (f"; unknown: {', '.join(unknown)}" if unknown else "")
                    + (f"; missing: {', '.join(missing)}" if missing else "")
                )
            values = {k: _param_value(self.name, k, given[k]) for k in keys}
            _check_params(self.name, values)
            object.__setattr__(self, "params", tuple((k, values[k]) for k in keys))
        object.__setattr__(self, "_model", _build(self.name, values, self.grid))

    @classmethod
    def of(cls, name: str, **params: float) -> Parent:
        """An analytic parent from keyword parameters.

        Examples:
            >>> Parent.of("uniform", low=0, high=32).describe()
            'uniform(low=0, high=32)'
        """
        return cls(name, tuple(params.items()))

    def param(self, key: str) -> float:
        """One parameter by name."""
        for k, v in self.params:
            if k == key:
                return v
        raise ConfigError(
            f"{self.name} has no parameter {key!r}; it has {', '.join(k for k, _ in self.params)}"
        )

    @property
    def support(self) -> tuple[float, float]:
        """The smallest interval holding all the mass (may be infinite)."""
        return (self._model.low, self._model.high)

    @property
    def kinks(self) -> tuple[float, ...]:
        """Points where the density is not smooth (inside or at the ends of the support)."""
        return self._model.kinks

    def mean(self) -> float:
        """The mean of one reading."""
        return self._model.mean()

    def sd(self) -> float:
        """The standard deviation of one reading."""
        return math.sqrt(self._model.variance())

    def cdf(self, x: ArrayLike) -> FloatArray:
        """P(X <= x), element-wise."""
        return self._model.cdf(_floats(x))

    def sf(self, x: ArrayLike) -> FloatArray:
        """P(X > x), element-wise, accurate in the upper tail."""
        return self._model.sf(_floats(x))

    def pdf(self, x: ArrayLike) -> FloatArray:
        """The density, element-wise."""
        return self._model.pdf(_floats(x))

    def logpdf(self, x: ArrayLike) -> FloatArray:
        """The log density, element-wise (``-inf`` outside the support)."""
        return self._model.logpdf(_floats(x))

    def ppf(self, q: ArrayLike) -> FloatArray:
        """The quantile function: x with P(X <= x) = q."""
        return self._model.ppf(_floats(q))

    def isf(self, q: ArrayLike) -> FloatArray:
        """The upper quantile function: x with P(X > x) = q, accurate for small q."""
        return self._model.isf(_floats(q))

    def describe(self) -> str:
        """The parent as text, e.g. ``"normal(mean=16, sd=6)"``; analytic forms parse back."""
        inner = ", ".join(f"{k}={_number_text(v)}" for k, v in self.params)
        return f"{self.name}({inner})"

    def to_state(self) -> State:
        """The parent as plain JSON-able data (an empirical parent with its lattice)."""
        state = header("parent", _SCHEMA)
        state["name"] = self.name
        state["params"] = dict(self.params)
        if self.grid is not None:
            state["origin"] = self.grid.origin
            state["step"] = self.grid.step
            state["weights"] = [float(w) for w in self.grid.weights]
        return state

    @classmethod
    def from_state(cls, state: State) -> Parent:
        """Rebuild from :meth:`to_state`; refuses other kinds, newer schemas and bad values."""
        check_header(state, "parent", _SCHEMA)
        name = get_str(state, "name")
        raw = state.get("params")
        if not isinstance(raw, dict):
            raise StateError("snapshot field 'params' must be an object of numbers")
        params = tuple((k, get_float(raw, k)) for k in raw)
        try:
            if name == EMPIRICAL:
                weights = get_float_list(state, "weights")
                if len(weights) > 4 * LATTICE_MAX_CELLS + 100_000:
                    raise StateError("empirical parent snapshot has too many weights")
                grid = EmpiricalGrid(get_float(state, "origin"), get_float(state, "step"), np.array(weights))
                return cls(name, params, grid)
            return cls(name, params)
        except ConfigError as exc:
            raise StateError(f"parent snapshot is not valid: {exc}") from exc


# ---------------------------------------------------------------- text


_TEXT = re.compile(r"^\s*([A-Za-z_]+)\s*(?:\((.*)\)|:(.*))?\s*$", re.DOTALL)


def parse_parent(text: str) -> Parent:
    """Read a parent from ``"NAME:key=value,..."`` or ``"NAME(key=value, ...)"``.

    Examples:
        >>> parse_parent("lognormal:log_mean=2.7,log_sd=0.25").describe()
        'lognormal(log_mean=2.7, log_sd=0.25)'
        >>> parse_parent("gauss:mean=1,sd=2")
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: unknown parent 'gauss'; allowed: exponential, gamma, ...
    """
    if not isinstance(text, str):
        raise ConfigError(f"parent must be text like 'normal:mean=16,sd=6', got {text!r}")
    match = _TEXT.match(text)
    if match is None:
        raise ConfigError(
            f"cannot read parent {text!r}; write NAME:key=value,... such as 'normal:mean=16,sd=6' "
            f"(names: {_ALLOWED_NAMES})"
        )
    name = match.group(1).lower()
    body = match.group(2) if match.group(2) is not None else match.group(3)
    if name == EMPIRICAL:
        raise ConfigError(
            "empirical parents cannot be written as text: build one from baseline data with "
            "empirical(sample) or fit_parent(sample), or restore it from a snapshot"
        )
    keys = FAMILIES.get(name)
    if keys is None:
        Parent(name, ())  # raises the unknown-name error
    allowed = ", ".join(FAMILIES[name])
    if body is None or not body.strip():
        example = ",".join(f"{k}=..." for k in FAMILIES[name])
        raise ConfigError(f"{name} needs parameters {allowed}, e.g. {name}:{example}")
    params: list[tuple[str, float]] = []
    for item in body.split(","):
        if "=" not in item:
            raise ConfigError(f"{name}: cannot read {item.strip()!r}; write key=value with keys {allowed}")
        key, _, value = item.partition("=")
        key = key.strip()
        try:
            number = float(value.strip())
        except ValueError:
            raise ConfigError(f"{name}: {key} must be a number, got {value.strip()!r}") from None
        params.append((key, number))
    return Parent(name, tuple(params))


# ---------------------------------------------------------------- empirical parents


def _sample(sample: ArrayLike, what: str) -> FloatArray:
    try:
        x = np.asarray(sample, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise ConfigError(f"{what}: sample must be a sequence of numbers") from None
    if not np.all(np.isfinite(x)):
        raise ConfigError(f"{what}: sample holds a value that is not a finite number")
    if x.shape[0] < EMPIRICAL_MIN_READINGS:
        raise NotEnoughData(what, needed=EMPIRICAL_MIN_READINGS, have=int(x.shape[0]), unit="readings")
    if float(np.ptp(x)) == 0.0:
        raise ConfigError(f"{what}: all readings are equal; a distribution cannot be fitted")
    return np.sort(x)


def empirical(sample: ArrayLike) -> Parent:
    """A smoothed density of baseline readings, with exponential tails (see the module notes).

    Examples:
        >>> rng = np.random.default_rng(1)
        >>> parent = empirical(rng.normal(16.0, 6.0, 500))
        >>> parent.name, abs(parent.mean() - 16.0) < 1.0, abs(parent.sd() - 6.0) < 0.8
        ('empirical', True, True)
        >>> float(parent.cdf(parent.support[0])), float(parent.sf(parent.support[1]))
        (0.0, 0.0)
    """
    x = _sample(sample, "empirical parent")
    n = x.shape[0]
    sd = float(np.std(x, ddof=1))
    q25, q75 = np.quantile(x, [0.25, 0.75])
    iqr = float(q75 - q25)
    spread = min(sd, iqr / 1.349) if iqr > 0 else sd
    bandwidth = 0.9 * spread * n**-0.2
    k = max(5, math.ceil(math.sqrt(n)))
    upper_threshold = float(x[n - k - 1])
    lower_threshold = float(x[k])
    span = upper_threshold - lower_threshold
    step = bandwidth / 4.0
    if span / step > LATTICE_MAX_CELLS:
        step = span / LATTICE_MAX_CELLS
    floor_scale = step
    upper_scale = max(float(np.mean(x[n - k :] - upper_threshold)), floor_scale)
    lower_scale = max(float(np.mean(lower_threshold - x[:k])), floor_scale)
    # body lattice between the thresholds (the lower one on a cell boundary), data linearly binned
    pad = math.ceil(8.0 * bandwidth / step) + 2
    origin = lower_threshold + 0.5 * step - pad * step
    cells = math.ceil((upper_threshold - origin) / step) + pad + 1
    u = (x - origin) / step
    j = np.floor(u).astype(np.int64)
    frac = u - j
    counts = np.bincount(j, weights=1.0 - frac, minlength=cells + 1)[: cells + 1]
    counts += np.bincount(j + 1, weights=frac, minlength=cells + 1)[: cells + 1]
    kernel_sd = math.sqrt(max(bandwidth**2 - step**2 / 3.0, (0.5 * bandwidth) ** 2))
    d = np.arange(-pad, pad + 1, dtype=np.float64)
    kernel = special.ndtr((d + 0.5) * step / kernel_sd) - special.ndtr((d - 0.5) * step / kernel_sd)
    smooth = np.convolve(counts, kernel, mode="same")
    first = pad  # first body cell: its lower edge is the lower threshold
    last = max(first, math.floor((upper_threshold - origin) / step + 0.5) - 1)
    body = smooth[first : last + 1]
    tail_mass = k / n
    body = body * ((1.0 - 2.0 * tail_mass) / body.sum())
    lower_ratio = math.exp(-step / lower_scale)
    upper_ratio = math.exp(-step / upper_scale)
    lower_len = math.ceil(math.log(_WEIGHT_FLOOR) / math.log(lower_ratio)) + 1
    upper_len = math.ceil(math.log(_WEIGHT_FLOOR) / math.log(upper_ratio)) + 1
    # geometric tails carrying k / N each: the lattice form of an exponential excess law
    lower_tail = tail_mass * (1.0 - lower_ratio) * lower_ratio ** np.arange(lower_len - 1, -1, -1.0)
    upper_tail = tail_mass * (1.0 - upper_ratio) * upper_ratio ** np.arange(0.0, upper_len)
    weights = np.concatenate([lower_tail, body, upper_tail])
    grid_origin = origin + (first - lower_tail.shape[0]) * step
    grid = EmpiricalGrid(grid_origin, step, weights)
    params = (
        ("readings", float(n)),
        ("bandwidth", bandwidth),
        ("step", step),
        ("lower_threshold", lower_threshold),
        ("lower_tail_scale", lower_scale),
        ("upper_threshold", upper_threshold),
        ("upper_tail_scale", upper_scale),
    )
    return Parent(EMPIRICAL, params, grid)


# ---------------------------------------------------------------- fitting


class Candidate(NamedTuple):
    """One fitted family: the parent at its maximum likelihood, its log-likelihood and AIC."""

    parent: Parent
    log_likelihood: float
    aic: float


@dataclass(frozen=True, slots=True)
class FitReport:
    """What :func:`fit_parent` found.

    Attributes:
        chosen: the parent to use: the best family by AIC, or the empirical parent if that
            family failed the goodness-of-fit test.
        candidates: every fitted family, best AIC first.
        best: the family with the lowest AIC (equal to ``chosen`` unless it fell back).
        anderson_darling: the Anderson-Darling statistic of ``best`` on the sample.
        p_value: its goodness-of-fit p-value (parametric bootstrap, see ``method``).
        fell_back: True when ``p_value <= alpha`` and ``chosen`` is empirical.
        skipped: families not fitted, with the reason (e.g. they need positive readings).
        method: how the p-value was obtained.
    """

    chosen: Parent
    candidates: tuple[Candidate, ...]
    best: Parent
    anderson_darling: float
    p_value: float
    fell_back: bool
    skipped: tuple[tuple[str, str], ...] = ()
    method: str = ""


def _fit_gamma(x: FloatArray) -> tuple[float, float]:
    """Maximum likelihood (shape, scale) with location 0: log k - digamma(k) = log mean - mean log."""
    mean = float(np.mean(x))
    s = math.log(mean) - float(np.mean(np.log(x)))
    if s <= 0:
        raise ConfigError("gamma fit failed: readings are too concentrated")

    def g(log_k: float) -> float:
        k = math.exp(log_k)
        return math.log(k) - float(special.digamma(k)) - s

    log_k = optimize.brentq(g, math.log(1e-8), math.log(1e10), xtol=1e-14, rtol=1e-14)
    shape = math.exp(log_k)
    return shape, mean / shape


def _fit_weibull(x: FloatArray) -> tuple[float, float]:
    """Maximum likelihood (shape, scale) with location 0.

    The shape solves ``sum x^k log x / sum x^k - 1/k = mean log x`` (increasing in k).
    """
    y = x / float(np.max(x))
    logy = np.log(y)
    mean_log = float(np.mean(logy))

    def g(log_k: float) -> float:
        k = math.exp(log_k)
        p = np.power(y, k)
        return float(np.dot(p, logy) / p.sum()) - 1.0 / k - mean_log

    log_k = optimize.brentq(g, math.log(1e-3), math.log(1e4), xtol=1e-14, rtol=1e-14)
    shape = math.exp(log_k)
    scale = float(np.max(x)) * float(np.mean(np.power(y, shape))) ** (1.0 / shape)
    return shape, scale


def _mle(name: str, x: FloatArray) -> Parent:
    if name == "normal":
        return Parent.of("normal", mean=float(np.mean(x)), sd=float(np.std(x)))
    if name == "lognormal":
        logs = np.log(x)
        return Parent.of("lognormal", log_mean=float(np.mean(logs)), log_sd=float(np.std(logs)))
    if name == "gamma":
        shape, scale = _fit_gamma(x)
        return Parent.of("gamma", shape=shape, scale=scale)
    if name == "weibull":
        shape, scale = _fit_weibull(x)
        return Parent.of("weibull", shape=shape, scale=scale)
    if name == "exponential":
        return Parent.of("exponential", mean=float(np.mean(x)))
    return Parent.of("uniform", low=float(np.min(x)), high=float(np.max(x)))


_FREE_PARAMS = {"normal": 2, "lognormal": 2, "gamma": 2, "weibull": 2, "exponential": 1, "uniform": 2}


def _anderson_darling(parent: Parent, x_sorted: FloatArray) -> float:
    """A^2 = -N - (1/N) sum (2i - 1) [log F(x_i) + log S(x_(N+1-i))], with F, S kept off zero."""
    n = x_sorted.shape[0]
    lower = np.log(np.maximum(parent.cdf(x_sorted), 1e-300))
    upper = np.log(np.maximum(parent.sf(x_sorted[::-1]), 1e-300))
    i = np.arange(1, n + 1, dtype=np.float64)
    return float(-n - np.dot(2.0 * i - 1.0, lower + upper) / n)


def fit_parent(
    sample: ArrayLike,
    candidates: Sequence[str] = DEFAULT_CANDIDATES,
    *,
    alpha: float = 0.01,
    bootstrap: int = 999,
    seed: int = 20261,
) -> FitReport:
    """Fit each candidate family by maximum likelihood, choose by AIC, test the choice.

    Fits (location fixed at 0 for the positive families, which then need positive readings):
    normal and lognormal in closed form; gamma and Weibull by solving their likelihood
    equations (one-dimensional, bracketed root finding); exponential and uniform in closed
    form. AIC = 2 (free parameters) - 2 (log-likelihood).

    Goodness of fit: the Anderson-Darling statistic of the chosen family, with a p-value from
    a parametric bootstrap that re-fits every simulated sample (so the estimated parameters
    are accounted for): ``p = (1 + #{A*_b >= A}) / (bootstrap + 1)``, samples drawn with
    ``numpy.random.default_rng(seed)`` (deterministic). At or below ``alpha`` (the usual rule
    for Monte Carlo p-values, exact in level when ``alpha (bootstrap + 1)`` is a whole number)
    the empirical parent (:func:`empirical`) is chosen instead.

    Examples:
        >>> rng = np.random.default_rng(7)
        >>> report = fit_parent(rng.gamma(4.0, 2.0, 400), bootstrap=99)
        >>> report.chosen.name, report.fell_back
        ('gamma', False)
    """
    x = _sample(sample, "fit_parent")
    names = tuple(candidates)
    if not names:
        raise ConfigError(f"fit_parent: candidates must name at least one of {', '.join(_FITTABLE)}")
    for name in names:
        if name not in _FITTABLE:
            raise ConfigError(f"fit_parent: cannot fit {name!r}; candidates allowed: {', '.join(_FITTABLE)}")
    if not (isinstance(alpha, float | int) and 0.0 <= alpha < 1.0):
        raise ConfigError(f"fit_parent: alpha must be a number in [0, 1), got {alpha!r}")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int) or bootstrap < 19:
        raise ConfigError(f"fit_parent: bootstrap must be an integer of at least 19, got {bootstrap!r}")
    fitted: list[Candidate] = []
    skipped: list[tuple[str, str]] = []
    positive = bool(x[0] > 0)
    for name in dict.fromkeys(names):
        if name in ("lognormal", "gamma", "weibull", "exponential") and not positive:
            skipped.append((name, "needs positive readings"))
            continue
        try:
            parent = _mle(name, x)
        except (ConfigError, ValueError) as exc:
            skipped.append((name, f"fit failed: {exc}"))
            continue
        ll = float(np.sum(parent.logpdf(x)))
        fitted.append(Candidate(parent, ll, 2.0 * _FREE_PARAMS[name] - 2.0 * ll))
    if not fitted:
        raise ConfigError(
            "fit_parent: no candidate family could be fitted ("
            + "; ".join(f"{n}: {why}" for n, why in skipped)
            + ")"
        )
    fitted.sort(key=lambda c: c.aic)
    best = fitted[0].parent
    statistic = _anderson_darling(best, x)
    rng = np.random.default_rng(seed)
    exceed = 0
    n = x.shape[0]
    for _ in range(bootstrap):
        draw = np.sort(best.ppf(rng.random(n)))
        try:
            refit = _mle(best.name, draw)
        except (ConfigError, ValueError):
            exceed += 1
            continue
        if _anderson_darling(refit, draw) >= statistic:
            exceed += 1
    p_value = (1.0 + exceed) / (bootstrap + 1.0)
    fell_back = p_value <= alpha
    chosen = empirical(x) if fell_back else best
    return FitReport(
        chosen=chosen,
        candidates=tuple(fitted),
        best=best,
        anderson_darling=statistic,
        p_value=p_value,
        fell_back=fell_back,
        skipped=tuple(skipped),
        method=f"Anderson-Darling, parametric bootstrap with re-fitting ({bootstrap} samples, seed {seed})",
    )
