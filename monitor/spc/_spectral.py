"""Laws of weighted sums of independent readings from their characteristic functions.

The statistic is ``Y = c + sum_j a_j (X_j1 + ... + X_jm_j)`` (the mean of n readings: one term
``a = 1/n, m = n``; an EWMA: one term per past subgroup), optionally plus an independent
remainder treated as normal (the far past of an EWMA, with a stated bound). Its density on a
window ``[y_a, y_b]`` that holds its mass is a Fourier series whose coefficients are values of
the characteristic function ``psi(t) = E exp(i t Y)``:

    f(y) = (1/L) sum_k psi(w_k) exp(-i w_k (y - y_a)),   w_k = 2 pi k / L,  L = y_b - y_a,

and the series is integrated term by term for the CDF and the survival function. This is the
n-fold convolution done in the Fourier domain: ``psi`` is a product of the readings'
characteristic functions, so nothing is discretised in y. Errors, each bounded:

* aliasing: none when the window holds the support (bounded and truncated models); otherwise
  the window ends are placed beyond a Chernoff bound of 1e-250;
* truncation of the series after K terms: K grows until the terms fall below 1e-24, and the
  sum of the last half of the terms kept bounds the rest (it does for any decay at least as
  fast as 1/k^2; the densities here give at least that);
* round-off: about 1e-16 times the sum of the magnitudes of the terms. Far in a tail this
  floor is larger than the probability itself, so tails are computed from exponentially tilted
  series: the density of ``Y`` tilted by ``exp(theta y)`` has coefficients
  ``psi(w_k - i theta) / psi(-i theta)`` and its mass near the tail point of interest, so the
  same relative precision holds there; the tilt is undone exactly. Tilts are placed by the
  saddlepoint equation, each starting where the previous one loses relative precision. Each
  tilted series has its own window, widened on the side of the tilt until the tilted law's
  mass beyond it is negligible (else it would wrap around). Tilting stops at the tail floor,
  or where the tail is an exact power of the distance to a finite end of the support (sums of
  uniform or triangular readings near an end): the table continues it exactly from there.

Every grid value carries its estimated relative error; the caller tabulates the values and
their errors (see :mod:`monitor.spc._tables`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Final, Protocol

import numpy as np
from numpy.typing import NDArray
from scipy import fft as sfft
from scipy import special

from monitor.spc._tables import Grid, check_errors
from monitor.spc.parents import EmpiricalGrid, Parent

__all__ = [
    "GammaSpectrum",
    "LatticeSpectrum",
    "QuadratureSpectrum",
    "SeriesResult",
    "Spectrum",
    "Term",
    "TriangularSpectrum",
    "UniformSpectrum",
    "WeightedSum",
    "series_law",
    "spectrum_of",
]

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]

EPS: Final = 2.220446049250313e-16
TRUNCATION: Final = 1e-32
"""Mass of an unbounded parent left out at each end (truncated spectra)."""
CHERNOFF_GAP: Final = 1e-40
"""The window reaches where a Chernoff bound falls this far below the tail floor."""
TAIL_FLOOR: Final = 1e-40
"""Tilts are added until the tail probability falls below this (the table's far end)."""
MAX_TERMS: Final = 1 << 16
CORE_POINTS_PER_SD: Final = 64
ROUNDOFF: Final = 64.0 * EPS
INTERPOLATION: Final = 1e-9
"""Blocks are refined until the table interpolates every midpoint to this relative error."""
RELIABLE: Final = 1e-7
"""A grid value is kept when its estimated relative error is at most this."""
_TILT_GRID: Final = np.geomspace(1e-3, 1e5, 129)
"""Tilts (times 1 / sd) at which the log moment generating function and the tilted mean and sd
are tabulated (windows and Chernoff bounds are placed with these)."""
_GL_NODES: Final = 16
_GL_X, _GL_W = (np.asarray(a, dtype=np.float64) for a in special.roots_legendre(_GL_NODES))
_GL8_X, _GL8_W = (np.asarray(a, dtype=np.float64) for a in special.roots_legendre(8))


# ---------------------------------------------------------------- stable complex helpers


def _log_exprel(w: ComplexArray) -> ComplexArray:
    """log((exp(w) - 1) / w), accurate for small |w| and for large real parts of either sign."""
    w = np.asarray(w, dtype=np.complex128)
    out = np.empty_like(w)
    small = np.abs(w) < 1e-3
    ws = w[small]
    out[small] = np.log1p(ws / 2.0 + ws * ws / 6.0 + ws**3 / 24.0)
    big = ~small
    wb = w[big]
    pos = wb.real > 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        out_pos = wb + np.log(-np.expm1(-wb) / wb)
        out_neg = np.log(np.expm1(wb) / wb)
    out[big] = np.where(pos, out_pos, out_neg)
    return out


def _log_ramp(z: ComplexArray) -> ComplexArray:
    """Log E exp(z M) for M with density 2m on [0, 1]: 2 (e^z (z - 1) + 1) / z^2."""
    z = np.asarray(z, dtype=np.complex128)
    out = np.empty_like(z)
    small = np.abs(z) < 0.5
    zs = z[small]
    total = np.zeros_like(zs)
    term = np.ones_like(zs)
    for j in range(18):
        total += 2.0 * term / (j + 2)
        term = term * zs / (j + 1)
    out[small] = np.log(total)
    zb = z[~small]
    pos = zb.real > 0
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        out_pos = zb + np.log(2.0 * (zb - 1.0 + np.exp(-zb)) / (zb * zb))
        out_neg = np.log(2.0 * (np.exp(zb) * (zb - 1.0) + 1.0) / (zb * zb))
    out[~small] = np.where(pos, out_pos, out_neg)
    return out


def _log_add(a: ComplexArray, b: ComplexArray) -> ComplexArray:
    """log(exp(a) + exp(b)) for complex logs."""
    swap = b.real > a.real
    hi = np.where(swap, b, a)
    lo = np.where(swap, a, b)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return np.asarray(hi + np.log1p(np.exp(lo - hi)), dtype=np.complex128)


# ---------------------------------------------------------------- spectra of one reading


class Spectrum(Protocol):
    """The characteristic function of one reading's model on a finite window."""

    low: float
    high: float
    truncation: float
    """Probability of the parent outside ``[low, high]`` (both ends) that the model leaves out."""
    roundoff: float
    """Relative accuracy of one value of ``log_cf_uniform`` (at most; absolute for ``|cf| <= 1``)."""
    mean: float
    variance: float
    abs_third: float

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        """Log E exp(i u (X - anchor)) for complex u (Im u < 0 tilts upwards); moderate accuracy."""
        ...

    def log_cf_uniform(self, tilt: float, spacing: float, count: int, anchor: float) -> ComplexArray:
        """``log E exp(i u_k (X - anchor))`` at ``u_k = k spacing - i tilt``, k < count, accurately."""
        ...


def _log_mix(z: ComplexArray, shift: FloatArray, weights: FloatArray) -> ComplexArray:
    """Log sum_j weights_j exp(z shift_j) for each z (real arithmetic when z is real)."""
    flat = z.ravel()
    out = np.empty(flat.shape, dtype=np.complex128)
    if not bool(np.any(flat.imag)):
        real = flat.real
        for start in range(0, real.shape[0], 256):
            r = np.outer(real[start : start + 256], shift)
            peak = np.max(r, axis=1)
            with np.errstate(under="ignore", divide="ignore"):
                out[start : start + 256] = np.log(np.exp(r - peak[:, None]) @ weights) + peak
        return out.reshape(z.shape)
    for start in range(0, flat.shape[0], 64):
        e = np.outer(flat[start : start + 64], shift)
        top = np.max(e.real, axis=1)
        with np.errstate(under="ignore", divide="ignore"):
            out[start : start + 64] = np.log(np.exp(e - top[:, None]) @ weights) + top
    return out.reshape(z.shape)


def _mix_moments(
    theta: FloatArray, shift: FloatArray, weights: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """For real theta: log sum_j w_j exp(theta s_j) and the mean and variance of s under that tilt."""
    r = np.outer(theta, shift)
    peak = np.max(r, axis=1)
    with np.errstate(under="ignore"):
        e = np.exp(r - peak[:, None]) * weights
    total = e.sum(axis=1)
    mean = (e @ shift) / total
    var = np.einsum("ij,ij->i", e, (shift[None, :] - mean[:, None]) ** 2) / total
    return np.log(total) + peak, mean, var


def _uniform_points(tilt: float, spacing: float, count: int) -> ComplexArray:
    return np.asarray(np.arange(count) * spacing - 1j * tilt, dtype=np.complex128)


class _ClosedForm:
    """Shared parts of the closed-form spectra."""

    truncation = 0.0
    roundoff = ROUNDOFF

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:  # pragma: no cover - overridden
        raise NotImplementedError

    def log_cf_uniform(self, tilt: float, spacing: float, count: int, anchor: float) -> ComplexArray:
        return self.log_cf(_uniform_points(tilt, spacing, count), anchor)


class UniformSpectrum(_ClosedForm):
    """Uniform on [low, high]: closed form."""

    def __init__(self, low: float, high: float) -> None:
        self.low, self.high = low, high
        self.mean = 0.5 * (low + high)
        self.variance = (high - low) ** 2 / 12.0
        self.abs_third = (high - low) ** 3 / 32.0

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        return np.asarray(z * (self.low - anchor) + _log_exprel(z * (self.high - self.low)), np.complex128)


class TriangularSpectrum(_ClosedForm):
    """Triangular(low, mode, high): a mixture of two ramps, closed form."""

    def __init__(self, low: float, mode: float, high: float) -> None:
        self.low, self.mode, self.high = low, mode, high
        self.left = (mode - low) / (high - low)
        parent = Parent.of("triangular", low=low, mode=mode, high=high)
        self.mean = parent.mean()
        self.variance = parent.sd() ** 2
        self.abs_third = _GaussLegendre(parent).abs_third

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        a, c, b = self.low, self.mode, self.high
        parts: list[ComplexArray] = []
        if self.left > 0:
            parts.append(math.log(self.left) + z * (a - anchor) + _log_ramp(z * (c - a)))
        if self.left < 1:
            parts.append(math.log1p(-self.left) + z * (b - anchor) + _log_ramp(-z * (b - c)))
        if len(parts) == 1:
            return parts[0]
        return _log_add(parts[0], parts[1])


class GammaSpectrum(_ClosedForm):
    """Gamma(shape, scale) (exponential: shape 1): ``(1 - i u scale)^-shape``, closed form.

    The law is not truncated; ``high`` is the ``TRUNCATION`` upper quantile, and that much mass
    per reading is counted against the window (aliasing).
    """

    def __init__(self, shape: float, scale: float) -> None:
        self.shape, self.scale = shape, scale
        self.low = 0.0
        self.high = float(Parent.of("gamma", shape=shape, scale=scale).isf(TRUNCATION))
        self.truncation = TRUNCATION
        self.mean = shape * scale
        self.variance = shape * scale * scale
        self.abs_third = _GaussLegendre(Parent.of("gamma", shape=shape, scale=scale)).abs_third

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        inside = z.real * self.scale < 1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            value = -self.shape * np.log1p(-z * self.scale) - z * anchor
        # beyond the strip of the moment generating function the tilted mean is infinite
        return np.asarray(np.where(inside, value, np.inf + 0.0j), np.complex128)


def _dft_log_sum(
    values: FloatArray, x0: float, h: float, tilt: float, spacing: float, count: int, anchor: float
) -> ComplexArray:
    """Log sum_j values_j exp((tilt + i k spacing) (x0 + j h - anchor)) for k < count.

    The tilt is applied to the values (with the anchor on the side of the tilt every factor is
    at most 1). The oscillating part is one FFT when ``spacing h = 2 pi / N`` for an integer N
    (values folded modulo N, which is exact), otherwise one chirp-z transform.
    """
    x = x0 + h * np.arange(values.shape[0])
    with np.errstate(under="ignore"):
        tilted = values * np.exp(tilt * (x - anchor))
    top = float(np.max(tilted))
    tilted = tilted / top
    period = 2.0 * math.pi / (spacing * h)
    size = round(period) if period < 1e9 else 0
    if 1 <= size <= max(4 * (values.shape[0] + count) + 1024, 1 << 18) and abs(period - size) < 1e-7:
        folded = np.zeros(size)
        whole = (tilted.shape[0] // size) * size
        if whole:
            folded += tilted[:whole].reshape(-1, size).sum(axis=0)
        folded[: tilted.shape[0] - whole] += tilted[whole:]
        # sum_j t_j e^{+2 pi i j k / N} = conj(rfft(t))[k] (real t); k < N/2 always here
        half = np.conj(sfft.rfft(folded))
        k = np.arange(count) % size
        mirror = k > size // 2
        sums = np.where(
            mirror,
            np.conj(half[np.minimum(size - k, half.shape[0] - 1)]),
            half[np.minimum(k, half.shape[0] - 1)],
        )
    else:
        sums = chirp_z(tilted.astype(np.complex128), count, -spacing * h / (2.0 * math.pi))
    phase = np.arange(count) * spacing * (x0 - anchor)
    with np.errstate(divide="ignore"):
        return np.asarray(np.log(sums) + math.log(top) + 1j * phase, np.complex128)


class LatticeSpectrum:
    """The empirical lattice model: lattice weights times a cubic B-spline, closed form."""

    truncation = 0.0
    roundoff = 1e-13

    def __init__(self, grid: EmpiricalGrid) -> None:
        self.grid = grid
        self.lattice_step = grid.step
        self.low, self.high = grid.low, grid.high
        self.mean = grid.mean()
        self.variance = grid.variance()
        x: FloatArray = np.asarray(grid.origin + grid.step * np.arange(grid.cells), dtype=np.float64)
        self._x = x
        centered = np.abs(x - self.mean)
        # E|X - m|^3 <= E(|L - m| + h|V|)^3 with V the spline (E|V| = 0.4333..., E V^2 = 1/3, E|V|^3 < 0.35)
        h = grid.step
        self.abs_third = float(
            np.dot(grid.weights, centered**3 + 3.0 * h * 0.44 * centered**2 + 3.0 * h * h / 3.0 * centered)
            + 0.35 * h**3
        )

    def _log_spline(self, z: ComplexArray) -> ComplexArray:
        # cubic B-spline (4 uniforms of width h): E exp(z h V) = (sinh(zh/2) / (zh/2))^4
        w = z * self.grid.step
        return np.asarray(4.0 * (_log_exprel(w) - w / 2.0), np.complex128)

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        mixed = _log_mix(z, self._x - anchor, self.grid.weights)
        return np.asarray(mixed + self._log_spline(z), np.complex128)

    def tilted_moments(self, theta: FloatArray, anchor: float) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log E exp(theta (X - anchor)) and the mean and variance of X - anchor under the tilt."""
        k, mean, var = _mix_moments(theta, self._x - anchor, self.grid.weights)
        # the spline, a sum of 4 uniforms of width h about 0: log (sinh(a) / a)^4, a = theta h / 2
        a = np.abs(theta) * self.grid.step / 2.0
        half = self.grid.step / 2.0
        small = a < 0.1  # Taylor series there (the closed forms cancel), to about 1e-20
        b = a * a
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            safe = np.where(small, 1.0, a)
            coth = 1.0 / np.tanh(safe)
            log_ratio = np.where(
                small,
                b * (1 / 6 - b * (1 / 180 - b * (1 / 2835 - b * (1 / 37800 - b / 467775)))),
                safe + np.log(-np.expm1(-2.0 * safe) / (2.0 * safe)),
            )
            slope = np.where(
                small,
                a * (1 / 3 - b * (1 / 45 - b * (2 / 945 - b * (1 / 4725 - b * 2 / 93555)))),
                coth - 1.0 / safe,
            )
            curve = np.where(
                small,
                1 / 3 - b * (1 / 15 - b * (2 / 189 - b * (1 / 675 - b * 2 / 10395))),
                1.0 / (safe * safe) - (coth * coth - 1.0),
            )
        return (
            k + 4.0 * log_ratio,
            mean + np.sign(theta) * 4.0 * half * slope,
            var + 4.0 * half * half * curve,
        )

    def log_cf_uniform(self, tilt: float, spacing: float, count: int, anchor: float) -> ComplexArray:
        sums = _dft_log_sum(self.grid.weights, self.grid.origin, self.grid.step, tilt, spacing, count, anchor)
        return np.asarray(sums + self._log_spline(1j * _uniform_points(tilt, spacing, count)), np.complex128)


def _panels(
    parent: Parent, low: float, high: float, count: int, max_width: float = math.inf
) -> tuple[FloatArray, FloatArray]:
    """Gauss-Legendre nodes and weights times the density over [low, high].

    Panel edges at quantiles evenly spaced in logit(probability) (so they crowd where the mass
    is and spread out geometrically in the tails) and at the density's kinks; panels wider
    than ``max_width`` are split.
    """
    end = -float(special.logit(TRUNCATION))
    s = np.linspace(-end, end, count + 1)
    lower = parent.ppf(special.expit(s[s <= 0]))
    upper = parent.isf(special.expit(-s[s > 0]))
    edges = np.concatenate([[low, high], lower, upper, np.asarray(parent.kinks)])
    edges = np.unique(edges[np.isfinite(edges) & (edges >= low) & (edges <= high)])
    if math.isfinite(max_width):
        pieces = np.maximum(1, np.ceil(np.diff(edges) / max_width)).astype(np.int64)
        widths = np.repeat(np.diff(edges) / pieces, pieces)
        offsets = np.concatenate([np.arange(k) for k in pieces])
        left = np.repeat(edges[:-1], pieces) + offsets * widths
    else:
        left = edges[:-1]
        widths = np.diff(edges)
    x = (left[:, None] + 0.5 * widths[:, None] * (_GL_X[None, :] + 1.0)).ravel()
    w = (0.5 * widths[:, None] * _GL_W[None, :]).ravel()
    return x, w * parent.pdf(x)


class _GaussLegendre:
    """Composite Gauss-Legendre nodes for a parent truncated at its ``TRUNCATION`` quantiles."""

    def __init__(self, parent: Parent) -> None:
        lo, hi = parent.support
        low = float(parent.ppf(TRUNCATION)) if not math.isfinite(lo) else lo
        high = float(parent.isf(TRUNCATION)) if not math.isfinite(hi) else hi
        self.low, self.high = low, high
        x, w = _panels(parent, low, high, 48)
        self.mass = float(w.sum())
        self.x, self.w = x, w / self.mass
        self.mean = float(np.dot(self.w, x))
        self.variance = float(np.dot(self.w, (x - self.mean) ** 2))
        self.abs_third = float(np.dot(self.w, np.abs(x - self.mean) ** 3))

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        return np.asarray(_log_mix(z, self.x - anchor, self.w), np.complex128)


class QuadratureSpectrum:
    """Lognormal or Weibull readings: Gauss-Legendre quadrature on the probability scale.

    Nodes are Gauss-Legendre points (8 per panel) in t = logit(F) on panels of width 1/2 in
    the body widening to 2 in the tails, mapped to readings by the exact quantile function,
    with the weights ``dF = F (1 - F) dt``; they cover probabilities down to ``TRUNCATION``
    on each side (mass counted against the window). The characteristic function is the
    weighted sum of ``exp(i u x)`` over the nodes, exact for the discrete law of the nodes and
    close to the parent's while the panels resolve ``u`` (the series stops where its terms no
    longer fall, and the bound says what is left). Upward tilts need a finite moment
    generating function beyond zero: a lognormal parent or a Weibull one of shape at most 1
    has none (its upper tail is heavier than any exponential), so those are only tilted
    downwards (``upward`` False) and their far upper tails come from the untilted series.
    """

    roundoff = 1e-13

    def __init__(self, parent: Parent) -> None:
        from monitor.spc._integrals import PositiveReading  # noqa: PLC0415 - one-way dependency

        if parent.name not in ("lognormal", "weibull", "gamma", "exponential"):
            raise ValueError(f"no quadrature spectrum for {parent.name}")
        reading = PositiveReading(parent)
        end = -math.log(TRUNCATION)
        upper = [0.0]
        while upper[-1] < end:
            last = upper[-1]
            upper.append(last + min(2.0, 0.5 + 0.1 * max(0.0, last - 6.0)))
        half = np.asarray(upper)
        edges = np.concatenate([-half[:0:-1], half])
        left, width = edges[:-1], np.diff(edges)
        t = (left[:, None] + 0.5 * width[:, None] * (_GL8_X[None, :] + 1.0)).ravel()
        w = (0.5 * width[:, None] * _GL8_W[None, :]).ravel() * special.expit(t) * special.expit(-t)
        self.truncation = 2.0 * TRUNCATION
        self.x = reading.x_of_t(t)
        self.w = w / w.sum()
        self.low = 0.0
        self.high = float(self.x[-1])
        self.mean = float(np.dot(self.w, self.x))
        self.variance = float(np.dot(self.w, (self.x - self.mean) ** 2))
        self.abs_third = float(np.dot(self.w, np.abs(self.x - self.mean) ** 3))
        name = parent.name
        self.upward = name in ("gamma", "exponential") or (name == "weibull" and parent.param("shape") > 1.0)

    def log_cf(self, u: ComplexArray, anchor: float) -> ComplexArray:
        z = 1j * np.asarray(u, dtype=np.complex128)
        return np.asarray(_log_mix(z, self.x - anchor, self.w), np.complex128)

    def log_cf_uniform(self, tilt: float, spacing: float, count: int, anchor: float) -> ComplexArray:
        return self.log_cf(_uniform_points(tilt, spacing, count), anchor)

    def tilted_moments(self, theta: FloatArray, anchor: float) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log E exp(theta (X - anchor)) and the mean and variance of X - anchor under the tilt."""
        return _mix_moments(theta, self.x - anchor, self.w)


def spectrum_of(parent: Parent, *, numerical: bool = False) -> Spectrum:
    """The spectrum of a parent: closed forms where they exist, else quadrature.

    ``numerical`` forces quadrature on a gamma or exponential parent (to test it).
    """
    name = parent.name
    if name == "uniform":
        return UniformSpectrum(parent.param("low"), parent.param("high"))
    if name == "triangular":
        return TriangularSpectrum(parent.param("low"), parent.param("mode"), parent.param("high"))
    if parent.grid is not None:
        return LatticeSpectrum(parent.grid)
    if name in ("gamma", "exponential") and not numerical:
        shape = parent.param("shape") if name == "gamma" else 1.0
        scale = parent.param("scale") if name == "gamma" else parent.param("mean")
        return GammaSpectrum(shape, scale)
    if name in ("lognormal", "weibull", "gamma", "exponential"):
        return QuadratureSpectrum(parent)
    raise ValueError(f"no spectrum for {name}")


# ---------------------------------------------------------------- the weighted sum


@dataclass(frozen=True, slots=True)
class Term:
    """``weight`` times the sum of ``count`` independent readings."""

    weight: float
    count: int


@dataclass(frozen=True, slots=True)
class WeightedSum:
    """``Y = constant + sum of terms + R``, R independent, approximately normal with a bound.

    ``remainder_third`` is ``sum count |weight|^3 E|X - mean|^3 / 6`` over the readings in R, so
    the log characteristic function of R is within ``remainder_third |t|^3`` of the normal one.
    """

    terms: tuple[Term, ...]
    constant: float = 0.0
    remainder_mean: float = 0.0
    remainder_variance: float = 0.0
    remainder_third: float = 0.0
    readings: int = field(default=0)
    """How many readings the terms hold (for the truncation bound)."""


@dataclass(frozen=True, slots=True)
class SeriesResult:
    """The law on a grid (see :class:`monitor.spc._tables.Grid`) and what bounds its errors.

    ``numerical_error`` is the largest estimated relative error of a kept tail value (NaN
    marks values that were not precise enough); ``absolute_error`` bounds the errors that do
    not shrink with the value (truncation of the parent, the normal remainder of an EWMA);
    ``floor`` is the tail probability below which values were dropped.
    """

    grid: Grid
    numerical_error: float
    numerical_absolute: float
    absolute_error: float
    floor: float
    support: tuple[float, float]
    window: tuple[float, float]
    terms: int
    tilts: int
    mean: float
    sd: float


class _Series:
    """One (possibly tilted) Fourier series of Y on the window and its values on the grid."""

    def __init__(
        self, log_psi: ComplexArray, log_m: float, theta: float, window: tuple[float, float], anchor: float
    ) -> None:
        # coefficients of the tilted density about the window start: E_theta exp(i w_k (Y - y_a))
        omega = 2.0 * math.pi * np.arange(log_psi.shape[0]) / (window[1] - window[0])
        self.theta = theta
        self.log_m = log_m
        self.anchor = anchor
        self.c = np.exp(log_psi - log_m + 1j * omega * (anchor - window[0]))
        self.c[0] = 1.0
        self.window = window


class _Engine:
    def __init__(self, spectrum: Spectrum, stat: WeightedSum) -> None:
        self.spectrum = spectrum
        self.stat = stat
        total_weight = sum(t.weight * t.count for t in stat.terms)
        self.total_weight = total_weight
        self.mean = stat.constant + total_weight * spectrum.mean + stat.remainder_mean
        var = sum(t.weight**2 * t.count for t in stat.terms) * spectrum.variance + stat.remainder_variance
        self.sd = math.sqrt(var)
        base = stat.constant + stat.remainder_mean
        self.anchor_low = base + total_weight * spectrum.low
        self.anchor_high = base + total_weight * spectrum.high
        unbounded = stat.remainder_variance > 0
        self.support = (
            -math.inf if unbounded else self.anchor_low,
            math.inf if unbounded else self.anchor_high,
        )
        self._tilts: dict[bool, tuple[FloatArray, FloatArray, FloatArray]] = {}
        self._log_mgf: dict[bool, tuple[FloatArray, FloatArray]] = {}
        self._cumulants: dict[float, float] = {}

    def log_psi(self, tau: ComplexArray, *, upward: bool) -> ComplexArray:
        """Log E exp(i tau (Y - A)), A the upper (upward) or lower anchor."""
        spectrum = self.spectrum
        anchor = spectrum.high if upward else spectrum.low
        out = np.zeros(np.shape(tau), dtype=np.complex128)
        with np.errstate(invalid="ignore"):
            for term in self.stat.terms:
                out += term.count * spectrum.log_cf(term.weight * tau, anchor)
            if self.stat.remainder_variance > 0:
                out += -0.5 * self.stat.remainder_variance * tau * tau
        return out

    def kappa(self, theta: float) -> float:
        """Log E exp(theta (Y - A)), A the anchor on the side of theta."""
        value = self.log_psi(np.array([-1j * theta]), upward=theta > 0)[0]
        return float(value.real)

    def _tilt_table(self, upward: bool) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Tilts on a geometric grid with the tilted mean and sd of Y."""
        if upward not in self._tilts:
            self._tabulate_tilts(upward)
        return self._tilts[upward]

    def _tabulate_tilts(self, upward: bool) -> None:
        """Log E exp(t (Y - A)), and the mean and sd of Y tilted by t, for t on the tilt grid.

        Moments come from the spectrum where it gives them (lattices, quadrature nodes), else
        from central differences of the log moment generating function.
        """
        theta = _TILT_GRID / self.sd
        sign = 1.0 if upward else -1.0
        anchor = self.anchor_high if upward else self.anchor_low
        moments = self._tilted_moments(sign * theta, upward=upward)
        with np.errstate(invalid="ignore"):
            if moments is not None:
                k, mean, var = moments[0], anchor + moments[1], moments[2]
            else:
                h = 1e-3 * theta
                args = -1j * sign * np.concatenate([theta - h, theta, theta + h])
                ks = self.log_psi(args, upward=upward).real.reshape(3, -1)
                k = ks[1]
                mean = anchor + sign * (ks[2] - ks[0]) / (2.0 * h)
                var = (ks[2] - 2.0 * ks[1] + ks[0]) / (h * h)
            good = np.isfinite(mean) & np.isfinite(var) & (var > 0)
        order = np.maximum.accumulate(mean[good]) if upward else np.minimum.accumulate(mean[good])
        self._tilts[upward] = (sign * theta[good], order, np.sqrt(var[good]))
        finite = np.isfinite(k)
        self._log_mgf[upward] = (sign * theta[finite], k[finite])

    def _mgf_about_low(self) -> tuple[FloatArray, FloatArray]:
        """All tabulated tilts t (ascending, 0 included) and log E exp(t (Y - A_low))."""
        for side in (True, False):
            if side not in self._log_mgf:
                self._tabulate_tilts(side)
        tu, ku = self._log_mgf[True]
        td, kd = self._log_mgf[False]
        shift = self.anchor_high - self.anchor_low
        t = np.concatenate([td[::-1], [0.0], tu])
        k = np.concatenate([kd[::-1], [0.0], ku + tu * shift])
        return t, k

    def _tilted_moments(
        self, theta: FloatArray, *, upward: bool
    ) -> tuple[FloatArray, FloatArray, FloatArray] | None:
        """Log E exp(theta (Y - A)), mean of Y - A and variance of Y under the tilts.

        None unless the spectrum gives them directly.
        """
        moments = getattr(self.spectrum, "tilted_moments", None)
        if moments is None:
            return None
        anchor = self.spectrum.high if upward else self.spectrum.low
        r = self.stat.remainder_variance
        k = 0.5 * r * theta * theta
        mean = theta * r
        var = np.full(theta.shape[0], r)
        for term in self.stat.terms:
            kt, m, v = moments(term.weight * theta, anchor)
            k = k + term.count * kt
            mean = mean + term.count * term.weight * m
            var = var + term.count * term.weight**2 * v
        return k, mean, var

    def tilted_sd(self, theta: float) -> float:
        """The sd of Y under the tilt theta (interpolated from the tilt table)."""
        if theta == 0:
            return self.sd
        thetas, _, sds = self._tilt_table(theta > 0)
        return float(np.interp(abs(theta), np.abs(thetas), sds))

    def tilt_beyond(self, y: float, *, upward: bool, reach: float) -> float:
        """A tilt whose tilted law starts about ``reach`` tilted sds before y (its mean beyond y)."""
        thetas, means, sds = self._tilt_table(upward)
        if upward:
            start = np.maximum.accumulate(means - reach * sds)
            return float(np.interp(y, start, thetas))
        start = np.maximum.accumulate(-(means + reach * sds))
        return float(np.interp(-y, start, thetas))

    def window(self, floor: float) -> tuple[float, float]:
        """The support, narrowed to Chernoff bounds of ``floor * CHERNOFF_GAP`` on each side."""
        level = math.log(floor * CHERNOFF_GAP)
        t, k = self._mgf_about_low()
        # tilts up to 2000 / sd: steeper ones would cut the window inside a finite support, past
        # which the table continues an exact power law instead
        reach = np.abs(t) * self.sd <= 2000.0
        up, down = (t > 0) & reach, (t < 0) & reach
        shift = self.anchor_high - self.anchor_low
        # P(Y >= y) <= exp(K(t) - t (y - A)) for t > 0, and likewise below for t < 0
        y_hi = float(np.min(self.anchor_high + (k[up] - t[up] * shift - level) / t[up]))
        y_lo = float(np.max(self.anchor_low + (k[down] - level) / t[down]))
        lo_s, hi_s = self.support
        return max(y_lo, lo_s), min(y_hi, hi_s)

    def log_psi_uniform(self, theta: float, count: int, length: float) -> ComplexArray:
        """Log E exp(i t_k (Y - A)) at t_k = 2 pi k / length - i theta, k < count, accurately."""
        spectrum = self.spectrum
        upward = theta > 0
        anchor = spectrum.high if upward else spectrum.low
        spacing = 2.0 * math.pi / length
        out = np.zeros(count, dtype=np.complex128)
        for term in self.stat.terms:
            out += term.count * spectrum.log_cf_uniform(
                term.weight * theta, term.weight * spacing, count, anchor
            )
        if self.stat.remainder_variance > 0:
            tau = np.arange(count) * spacing - 1j * theta
            out += -0.5 * self.stat.remainder_variance * tau * tau
        return out

    def series(self, theta: float, window: tuple[float, float]) -> tuple[_Series, float, float]:
        """The series for tilt theta with enough terms.

        Returns it, the bound on the terms left out (sum of the last half kept, over
        ``|theta + i w_k|``) and the bound on the errors of the terms kept (round-off of the
        characteristic function, amplified by the power).
        """
        window = self._aligned(theta, self._widened(theta, window))
        length = window[1] - window[0]
        upward = theta > 0
        tilted_sd = self.tilted_sd(theta) if theta != 0 else self.sd
        count = max(32, math.ceil(length * 12.0 / (2.0 * math.pi * tilted_sd)))
        previous = math.inf
        while True:
            # powers of two, so the chirp-z transforms of successive series can be shared
            count = min(1 << max(5, math.ceil(math.log2(max(count, 32)))), MAX_TERMS)
            omega = 2.0 * math.pi * np.arange(count) / length
            log_psi = self.log_psi_uniform(theta, count, length)
            log_m = float(log_psi[0].real)
            magnitude = np.exp(log_psi.real - log_m)
            denominator = np.abs(theta + 1j * omega)
            denominator[0] = max(denominator[0], 2.0 * math.pi / length)
            scaled = magnitude / denominator
            tail = float(np.sum(scaled[count // 2 :]))
            # no use asking for a tail below the round-off of the coefficients themselves
            wanted = max(1e-16, 0.1 * self.spectrum.roundoff) * float(np.sum(scaled))
            if tail <= wanted or count >= MAX_TERMS:
                break
            # terms decaying slower than 1/k^2 would need more terms than any budget: stop, the
            # bound says what is left
            if count >= 4096 and tail > 0.25 * previous:
                break
            previous = tail
            # jump by the decay seen between the last two octaves (at least doubling)
            early = float(np.sum(scaled[count // 4 : count // 2]))
            rate = math.log2(max(early / max(tail, 1e-300), 1.0001))
            factor = 2.0 ** min(max(math.log2(tail / wanted) / rate, 1.0), 4.0)
            count = int(count * factor)
        result = _Series(log_psi, log_m, theta, window, self.anchor_high if upward else self.anchor_low)
        readings = sum(t.count for t in self.stat.terms)
        largest = max(t.count for t in self.stat.terms)
        relative = self.spectrum.roundoff
        errors = readings * relative * magnitude ** (1.0 - 1.0 / largest)
        kept = float(np.sum(errors / denominator))
        # mass of the tilted law outside the window wraps around into it (aliasing)
        kept += length * self.outside(theta, window)
        return result, tail, kept

    def _aligned(self, theta: float, window: tuple[float, float]) -> tuple[float, float]:
        """The window lengthened to a whole (FFT-friendly) number of lattice cells of the statistic.

        For a lattice parent and a single term the coefficients are then one zero-padded FFT of
        the lattice weights (see ``_dft_log_sum``). Lengthened away from the tilt, where the
        tilted law has no mass.
        """
        step = getattr(self.spectrum, "lattice_step", 0.0)
        if not step or len(self.stat.terms) != 1:
            return window
        unit = self.stat.terms[0].weight * step
        length = window[1] - window[0]
        cells = sfft.next_fast_len(math.ceil(length / unit - 1e-9), real=True)
        extra = cells * unit - length
        return (window[0] - extra, window[1]) if theta > 0 else (window[0], window[1] + extra)

    def _widened(self, theta: float, window: tuple[float, float]) -> tuple[float, float]:
        """The window of one tilted series, widened on the side of the tilt.

        Within the support, until the tilted law's mass beyond it is negligible (so that it
        does not wrap around into the window).
        """
        if theta == 0:
            return window
        low, high = window
        length = high - low
        for _ in range(12):
            if length * self.outside(theta, (low, high)) <= 1e-30:
                break
            if theta > 0:
                if high >= self.support[1]:
                    break
                high = min(self.support[1], high + (high - low))
            else:
                if low <= self.support[0]:
                    break
                low = max(self.support[0], low - (high - low))
            length = high - low
        return low, high

    def outside(self, theta: float, window: tuple[float, float]) -> float:
        """Chernoff bound on the probability, under the tilt theta, of Y outside the window.

        Under the tilt, ``P(Y >= b) <= exp(K(t) - K(theta) - (t - theta) (b - A))`` for every
        tabulated t > theta, and likewise below the window for t < theta.
        """
        anchor = self.anchor_high if theta > 0 else self.anchor_low
        here = self._cumulants.get(theta)
        if here is None:
            here = self.kappa(theta) if theta != 0 else 0.0
            self._cumulants[theta] = here  # the window changes between calls, the tilt not
        t, k_low = self._mgf_about_low()
        k = k_low + t * (self.anchor_low - anchor) - here
        above, below = t > theta, t < theta
        with np.errstate(invalid="ignore", over="ignore"):
            up = np.min(k[above] - (t[above] - theta) * (window[1] - anchor), initial=0.0)
            down = np.min(k[below] + (theta - t[below]) * (window[0] - anchor), initial=0.0)
        total = math.exp(float(up)) + math.exp(float(down))
        return total if math.isfinite(total) else 1.0


@dataclass(slots=True)
class _Block:
    """Nodes ``start + i step`` (i <= count) and the midpoints between them, with their values."""

    start: float
    step: float
    count: int
    values: tuple[FloatArray, ...] = ()
    hint: set[int] = field(default_factory=set)

    def points(self) -> FloatArray:
        return np.asarray(self.start + 0.5 * self.step * np.arange(2 * self.count + 1), dtype=np.float64)


BLOCK_NODES: Final = 32


def _layout(mean: float, sd: float, window: tuple[float, float], core_step: float) -> list[_Block]:
    """Blocks of the grid: a dense core of +/- 8 sd, the spacing doubling outwards every 1024 nodes."""
    ya, yb = window
    core_lo, core_hi = max(ya, mean - 8.0 * sd), min(yb, mean + 8.0 * sd)
    spans: list[tuple[float, float, float]] = [(core_lo, core_hi, core_step)]
    start, step = core_hi, core_step
    while start < yb:
        step *= 2.0
        end = min(yb, start + 1024.0 * step)
        spans.append((start, end, step))
        start = end
    start, step = core_lo, core_step
    while start > ya:
        step *= 2.0
        end = max(ya, start - 1024.0 * step)
        spans.insert(0, (end, start, step))
        start = end
    blocks: list[_Block] = []
    for lo, hi, step in spans:
        count = max(1, math.ceil((hi - lo) / step))
        blocks.append(_Block(lo, (hi - lo) / count, count))
    return blocks


def _split(block: _Block) -> list[_Block]:
    """A block as blocks of at most ``BLOCK_NODES`` nodes, values shared."""
    if block.count <= BLOCK_NODES:
        return [block]
    out = []
    for first in range(0, block.count, BLOCK_NODES):
        nodes = min(BLOCK_NODES, block.count - first)
        part = _Block(block.start + first * block.step, block.step, nodes)
        part.values = tuple(v[2 * first : 2 * (first + nodes) + 1] for v in block.values)
        out.append(part)
    return out


def _turns(fraction: float, integers: FloatArray) -> FloatArray:
    """``fraction * integers`` modulo 1, to about 1e-16, for integers below 2**33.

    ``fraction`` is split into parts of at most 20 significant bits whose products with the
    integers are exact in double precision (so the reduction modulo 1 loses nothing); only the
    last part, below 2**-41, is multiplied with rounding.
    """
    fraction -= math.floor(fraction)
    high = round(fraction * 2.0**20) / 2.0**20
    middle = round((fraction - high) * 2.0**40) / 2.0**40
    low = fraction - high - middle
    a = high * integers
    b = middle * integers
    return (a - np.floor(a)) + (b - np.floor(b)) + low * integers


def chirp_z(a: ComplexArray, outputs: int, fraction: float) -> ComplexArray:
    """``sum_k a_k exp(-2 pi i fraction k j)`` for ``j < outputs`` (Bluestein's algorithm), per row.

    Three FFTs. The chirp ``exp(-i pi fraction k^2)`` is computed from ``k^2`` reduced exactly
    modulo the period (see ``_turns``), so the result is within a few units of rounding of the
    sum of ``|a_k|``; a chirp computed as a complex power loses about three digits at the sizes
    used here.

    Examples:
        >>> a = np.array([1.0, 2.0, 3.0], dtype=np.complex128)
        >>> np.allclose(chirp_z(a, 3, 1.0 / 3.0), np.fft.fft(a))
        True
    """
    inputs = a.shape[-1]
    size = sfft.next_fast_len(inputs + outputs - 1)
    k = np.arange(max(inputs, outputs), dtype=np.float64)
    chirp = np.exp(-2j * math.pi * _turns(0.5 * fraction, k * k))
    kernel = np.zeros(size, dtype=np.complex128)
    kernel[:outputs] = np.conj(chirp[:outputs])
    if inputs > 1:
        kernel[size - inputs + 1 :] = np.conj(chirp[1:inputs][::-1])
    spread = sfft.fft(a * chirp[:inputs], size, axis=-1) * sfft.fft(kernel)
    return np.asarray(chirp[:outputs] * sfft.ifft(spread, axis=-1)[..., :outputs], dtype=np.complex128)


def _czt_series(rows: ComplexArray, window: tuple[float, float], x: FloatArray) -> ComplexArray:
    """Each row's ``sum_k a_k exp(-i w_k (x - y_a))`` at increasing points x (one chirp-z per run).

    Runs are the stretches of x of equal spacing; the rows share each run's chirp.
    """
    ya, yb = window
    length = yb - ya
    count = rows.shape[1]
    k = np.arange(count)
    out = np.empty((rows.shape[0], x.shape[0]), dtype=np.complex128)
    steps = np.diff(x)
    breaks = np.flatnonzero(np.abs(np.diff(steps)) > 1e-9 * np.maximum(steps[1:], steps[:-1])) + 1
    starts = np.concatenate([[0], breaks])
    ends = np.concatenate([breaks + 1, [x.shape[0]]])
    for a, end in zip(starts.tolist(), ends.tolist(), strict=True):
        b = min(end, x.shape[0])
        run = b - a
        if run <= 0:
            continue
        step = float(x[a + 1] - x[a]) if run > 1 else 1.0
        shifted = rows * np.exp(-2j * math.pi * k * (float(x[a]) - ya) / length)
        out[:, a:b] = chirp_z(shifted, run, step / length)
    return out


def _evaluate(
    series: _Series, bound: float, x: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray]:
    """Log cdf, log sf, pdf at x and their relative errors (inf where a tail is not computed).

    ``bound`` is the absolute error of the sum over k of the coefficients over
    ``|theta + i w_k|`` (terms left out and errors of the terms kept).
    """
    ya, yb = series.window
    length = yb - ya
    count = series.c.shape[0]
    theta = series.theta
    omega = 2.0 * math.pi * np.arange(count) / length
    c = series.c
    size = x.shape[0]
    # the density's series and the tail's (coefficients over i w_k, or over theta + i w_k) together
    with np.errstate(divide="ignore", invalid="ignore"):
        if theta == 0:
            d = np.zeros(count, dtype=np.complex128)
            d[1:] = c[1:] / (1j * omega[1:])
        else:
            d = c / (theta + 1j * omega)
    rows = np.zeros((2, count), dtype=np.complex128)
    rows[0, 1:] = c[1:]
    rows[1, 1:] = d[1:]
    sums = _czt_series(rows, series.window, x).real
    density_sum = 1.0 + 2.0 * sums[0]
    density_scale = 1.0 + 2.0 * float(np.sum(np.abs(c[1:])))
    pdf_bound = 2.0 * bound * (abs(theta) + 2.0 * math.pi * count / length)
    rel_pdf_err = (ROUNDOFF * density_scale + pdf_bound) / np.maximum(np.abs(density_sum), 1e-300)
    v = x - ya
    vb = length
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        if theta == 0:
            h = 2.0 * (sums[1] - float(np.sum(d).real))
            sf_sum = (vb - v) + h
            cdf_sum = v - h
            scale = ROUNDOFF * (length + 4.0 * float(np.sum(np.abs(d)))) + 4.0 * bound
            log_sf = np.log(np.maximum(sf_sum, 0.0) / length)
            log_cdf = np.log(np.maximum(cdf_sum, 0.0) / length)
            sf_err = scale / np.abs(sf_sum)
            cdf_err = scale / np.abs(cdf_sum)
            pdf = np.maximum(density_sum, 0.0) / length
            return log_cdf, log_sf, pdf, cdf_err, sf_err, rel_pdf_err
        total = d[0].real + 2.0 * float(np.sum(d[1:]).real)
        g = d[0].real + 2.0 * sums[1]
        magnitude = abs(d[0]) + 2.0 * float(np.sum(np.abs(d[1:])))
        # the tilt is undone by M exp(-theta (y - A)), A the anchor of the series
        prefix = series.log_m - math.log(length) - theta * (x - series.anchor)
        none = np.full(size, np.nan)
        never = np.full(size, np.inf)
        if theta > 0:
            damp = np.exp(-theta * (vb - v))
            value = g - damp * total
            log_sf = prefix + np.log(np.maximum(value, 0.0))
            sf_err = (ROUNDOFF * magnitude + 2.0 * bound) * (1.0 + damp) / np.abs(value)
            log_cdf, cdf_err = none, never
        else:
            # cdf = M e^{-theta (y - A)} / L * (e^{theta v} total - g), theta < 0: e^{theta v} <= 1
            grow = np.exp(theta * v)
            value = grow * total - g
            log_cdf = prefix + np.log(np.maximum(value, 0.0))
            cdf_err = (ROUNDOFF * magnitude + 2.0 * bound) * (1.0 + grow) / np.abs(value)
            log_sf, sf_err = none, never
        pdf = np.exp(prefix) * np.maximum(density_sum, 0.0)
    return log_cdf, log_sf, pdf, cdf_err, sf_err, rel_pdf_err


# values kept per point: log cdf, log sf, pdf, then their relative errors, then the rung of each
_VALUES: Final = 9


class _Picker:
    """The rungs (tilted series) kept so far; evaluates them and keeps the best value of each kind."""

    def __init__(self) -> None:
        self.rungs: list[tuple[_Series, float]] = []

    def update(self, current: list[FloatArray], x: FloatArray, rungs: list[int]) -> None:
        """Evaluate the given rungs at x and keep, per kind, the value with the smallest error."""
        for r in rungs:
            series, bound = self.rungs[r]
            lc, ls, pd, ce, se, pe = _evaluate(series, bound, x)
            for kind, (value, error) in enumerate(((lc, ce), (ls, se), (pd, pe))):
                better = error < current[3 + kind]
                current[kind][better] = value[better]
                current[3 + kind][better] = error[better]
                current[6 + kind][better] = r

    @staticmethod
    def empty(size: int) -> list[FloatArray]:
        nan = [np.full(size, np.nan) for _ in range(3)]
        inf = [np.full(size, np.inf) for _ in range(3)]
        rung = [np.full(size, -1.0) for _ in range(3)]
        return nan + inf + rung


def _evaluate_blocks(picker: _Picker, blocks: list[_Block], rungs: list[int] | None) -> None:
    """Evaluate rungs on blocks.

    All blocks with the given rungs, or (``rungs`` None) the new, empty blocks with the rungs
    that were best around them.
    """
    if rungs is not None:
        todo = blocks
        wanted = rungs
    else:
        todo = [b for b in blocks if not b.values]
        if not todo:
            return
        wanted = sorted({int(r) for b in todo for r in b.hint})
    # unique points: a block that starts where the previous one ends shares that point
    pieces: list[FloatArray] = []
    index: list[NDArray[np.int64]] = []
    position = 0
    previous_end = math.nan
    for b in todo:
        pts = b.points()
        shared = abs(b.start - previous_end) <= 1e-12 * max(1.0, abs(b.start))
        if shared:
            pieces.append(pts[1:])
            index.append(np.arange(position - 1, position + pts.shape[0] - 1))
            position += pts.shape[0] - 1
        else:
            pieces.append(pts)
            index.append(np.arange(position, position + pts.shape[0]))
            position += pts.shape[0]
        previous_end = float(pts[-1])
    x = np.concatenate(pieces)
    if rungs is not None:
        current = _Picker.empty(x.shape[0])
        for b, idx in zip(todo, index, strict=True):
            for k in range(_VALUES):
                current[k][idx] = b.values[k]
    else:
        current = _Picker.empty(x.shape[0])
    picker.update(current, x, wanted)
    for b, idx in zip(todo, index, strict=True):
        b.values = tuple(v[idx] for v in current)


def _assemble(blocks: list[_Block]) -> tuple[FloatArray, NDArray[np.bool_], tuple[FloatArray, ...]]:
    """Points, node mask and values of all blocks (shared boundary points once)."""
    xs, nodes, vals = [], [], []
    for i, b in enumerate(blocks):
        skip = 0 if i == 0 else 1
        xs.append(b.points()[skip:])
        nodes.append((np.arange(skip, 2 * b.count + 1) % 2) == 0)
        vals.append(tuple(v[skip:] for v in b.values))
    x = np.concatenate(xs)
    values = tuple(np.concatenate([v[k] for v in vals]) for k in range(_VALUES))
    return x, np.concatenate(nodes), values


def series_law(spectrum: Spectrum, stat: WeightedSum, *, floor: float = TAIL_FLOOR) -> SeriesResult:
    """The law of the weighted sum on a grid, tails to ``floor`` by tilted series."""
    engine = _Engine(spectrum, stat)
    # below this the truncation of the parent may matter relatively: no tilts there, values dropped
    model_floor = max(floor, 1e6 * max(stat.readings, 1) * spectrum.truncation)
    log_floor = math.log(model_floor)
    window = engine.window(model_floor)
    blocks = _layout(engine.mean, engine.sd, window, engine.sd / CORE_POINTS_PER_SD)
    for b in blocks:
        b.values = tuple(_Picker.empty(2 * b.count + 1))
    picker = _Picker()
    max_terms = 0

    def absorb(theta: float) -> None:
        nonlocal max_terms
        series, left_out, kept = engine.series(theta, window)
        max_terms = max(max_terms, series.c.shape[0])
        picker.rungs.append((series, left_out + kept))
        _evaluate_blocks(picker, blocks, [len(picker.rungs) - 1])

    absorb(0.0)
    for upward in (True, False):
        if upward and not getattr(spectrum, "upward", True):
            continue
        theta = 0.0
        x, _, (log_cdf, log_sf, pdf, best_cdf, best_sf, *_) = _assemble(blocks)
        size = x.shape[0]
        middle = int(np.clip(np.searchsorted(x, engine.mean), 0, size - 1))
        last_edge = -1 if upward else size
        for _ in range(40):
            errors = best_sf if upward else best_cdf
            values = log_sf if upward else log_cdf
            side = np.arange(middle, size) if upward else np.arange(middle, -1, -1)
            ok = errors[side] <= RELIABLE
            if bool(np.all(ok)):
                break
            edge = int(side[max(int(np.argmin(ok)) - 1, 0)])
            progressed = edge > last_edge if upward else edge < last_edge
            if not progressed or not np.isfinite(values[edge]) or values[edge] < log_floor:
                break
            if _power_law_beyond(x, values, pdf, edge, engine.support, upward=upward):
                break
            last_edge = edge
            new_theta = engine.tilt_beyond(float(x[edge]), upward=upward, reach=1.5)
            if abs(new_theta - theta) <= 1e-9 * max(abs(theta), 1.0 / engine.sd):
                break
            theta = new_theta
            absorb(theta)
            x, _, (log_cdf, log_sf, pdf, best_cdf, best_sf, *_) = _assemble(blocks)
    # refine the blocks where the table's interpolation misses the values at the midpoints;
    # the Hermite error falls as step^4, so refine by the factor the error asks for
    exact_ends = spectrum.truncation == 0
    finest = engine.sd / (CORE_POINTS_PER_SD * 256.0)
    for _ in range(8):
        grid, _ = _grid_of(blocks, log_floor, exact_ends, engine.support, window)
        relative = check_errors(grid, support=engine.support)
        # no point interpolating more precisely than the values themselves are known
        _, _, current = _assemble(blocks)
        known = np.maximum(current[3], current[4])
        known = np.where(np.isfinite(known), np.minimum(known, RELIABLE), RELIABLE)
        bad = relative > np.maximum(INTERPOLATION, 4.0 * known)
        if not bool(np.any(bad)):
            break
        # split the blocks that hold failing points into small blocks, so only those are refined
        ends = np.array([b.start + b.count * b.step for b in blocks])
        holding = set((np.searchsorted(ends, grid.x[bad], side="left")).tolist())
        blocks = [part for i, b in enumerate(blocks) for part in (_split(b) if i in holding else [b])]
        starts = np.array([b.start for b in blocks])
        where = np.searchsorted(starts, grid.x[bad], side="right") - 1
        need: dict[int, float] = {}
        for i, e in zip(where.tolist(), relative[bad].tolist(), strict=True):
            need[i] = max(need.get(i, 1.0), e)
        refined: list[_Block] = []
        for i, b in enumerate(blocks):
            if i in need and b.step > finest:
                factor = min(16, 2 ** math.ceil(math.log2((need[i] / INTERPOLATION) ** 0.25 * 1.2)))
                step = max(b.step / factor, finest)
                parts = max(1, round(b.step / step))
                hint = {int(r) for r in np.concatenate([b.values[6], b.values[7], b.values[8]]) if r >= 0}
                child_step = b.step / parts
                total = b.count * parts
                for first in range(0, total, BLOCK_NODES):
                    nodes = min(BLOCK_NODES, total - first)
                    child = _Block(b.start + first * child_step, child_step, nodes)
                    child.hint = hint or {0}
                    refined.append(child)
            else:
                refined.append(b)
        if len(refined) == len(blocks) and all(a is b for a, b in zip(refined, blocks, strict=True)):
            break
        blocks = refined
        _evaluate_blocks(picker, blocks, None)
    grid, largest = _grid_of(blocks, log_floor, exact_ends, engine.support, window)
    _, _, final = _assemble(blocks)
    with np.errstate(over="ignore", invalid="ignore"):
        numeric = np.fmax(final[3] * np.exp(grid.log_cdf), final[4] * np.exp(grid.log_sf))
    absolute = spectrum.truncation * max(stat.readings, 1)
    if stat.remainder_variance > 0:
        absolute += _remainder_bound(engine, stat)
    return SeriesResult(
        grid=grid,
        numerical_error=largest,
        numerical_absolute=float(np.nanmax(numeric)) if bool(np.any(np.isfinite(numeric))) else 0.0,
        absolute_error=absolute,
        floor=model_floor,
        support=engine.support,
        window=window,
        terms=max_terms,
        tilts=len(picker.rungs),
        mean=engine.mean,
        sd=engine.sd,
    )


def _power_law_beyond(
    x: FloatArray,
    log_tail: FloatArray,
    pdf: FloatArray,
    edge: int,
    support: tuple[float, float],
    *,
    upward: bool,
) -> bool:
    """Whether the tail is an exact power of the distance to a finite end of the support there.

    Near a finite end the law of a sum of readings with polynomial densities (uniform,
    triangular) is a polynomial of the distance to the end, often a single power: then
    ``d log tail / d log distance`` is constant, the table's straight extension in the log of
    the distance is exact, and further tilts (which need ever more terms) add nothing.
    Checked at the edge and at twice and four times its distance, to 1e-9.
    """
    end = support[1] if upward else support[0]
    if not math.isfinite(end):
        return False
    distance = abs(end - x[edge])
    rates = []
    for factor in (1.0, 2.0, 4.0):
        target = end - factor * distance if upward else end + factor * distance
        j = int(np.clip(np.searchsorted(x, target), 0, x.shape[0] - 1))
        if abs(x[j] - target) > 1e-3 * distance or not np.isfinite(log_tail[j]) or pdf[j] <= 0:
            return False
        rates.append(abs(end - x[j]) * pdf[j] / math.exp(log_tail[j]))
    return bool(max(rates) - min(rates) <= 1e-9 * max(rates))


def _grid_of(
    blocks: list[_Block],
    log_floor: float,
    exact_ends: bool,
    support: tuple[float, float],
    window: tuple[float, float],
) -> tuple[Grid, float]:
    """The grid of the blocks with imprecise values (and values below the floor) set to NaN."""
    x, node, (log_cdf, log_sf, pdf, best_cdf, best_sf, *_) = _assemble(blocks)
    log_cdf, log_sf, best_cdf, best_sf = log_cdf.copy(), log_sf.copy(), best_cdf.copy(), best_sf.copy()
    if exact_ends and window[0] <= support[0]:
        log_cdf[0], best_cdf[0] = -np.inf, 0.0
    if exact_ends and window[1] >= support[1]:
        log_sf[-1], best_sf[-1] = -np.inf, 0.0
    with np.errstate(invalid="ignore"):
        drop_cdf = (best_cdf > RELIABLE) | (log_cdf < log_floor) & (best_cdf > 0)
        drop_sf = (best_sf > RELIABLE) | (log_sf < log_floor) & (best_sf > 0)
    kept = np.concatenate([best_cdf[~drop_cdf], best_sf[~drop_sf]])
    log_cdf[drop_cdf] = np.nan
    log_sf[drop_sf] = np.nan
    error = float(np.max(kept)) if kept.shape[0] else math.inf
    return Grid(x, log_cdf, log_sf, pdf, node), error


def _remainder_bound(engine: _Engine, stat: WeightedSum) -> float:
    """Bound on the CDF error from treating the remainder as normal.

    With ``|log psi_R(t) - log psi_normal(t)| <= r |t|^3`` the series coefficients change by at
    most ``|psi(t)| (exp(r |t|^3) - 1)``; the CDF error is at most the sum over k of that over
    ``pi k``.
    """
    if stat.remainder_third == 0:
        return 0.0
    ya, yb = engine.window(TAIL_FLOOR)
    length = yb - ya
    k = np.arange(1, 4096)
    t = 2.0 * math.pi * k / length
    psi = np.exp(engine.log_psi(t.astype(np.complex128), upward=False).real)
    change = psi * np.expm1(np.minimum(stat.remainder_third * t**3, 700.0))
    return float(np.sum(change / (math.pi * k)))
