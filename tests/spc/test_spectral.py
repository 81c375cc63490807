"""Building blocks of the Fourier-series laws, against mpmath at high precision.

* ``chirp_z`` (Bluestein's algorithm for ``sum_k a_k exp(-2 pi i f k j)``) against the same
  sums evaluated term by term by mpmath at 40 digits;
* the tilted moments of the empirical lattice model (lattice weights times a cubic B-spline of
  four uniforms; its moment generating function is ``sum_j w_j e^(t x_j) (sinh(th/2)/(th/2))^4``)
  against mpmath's numerical derivatives of that function.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from monitor.spc._spectral import LatticeSpectrum, chirp_z
from monitor.spc.parents import empirical


def _direct(a: np.ndarray, outputs: list[int], fraction: float) -> list[complex]:
    mpmath.mp.dps = 40
    f = mpmath.mpf(fraction)
    terms = [mpmath.mpc(complex(v)) for v in a]
    return [
        complex(mpmath.fsum(t * mpmath.expjpi(-2 * f * k * j) for k, t in enumerate(terms))) for j in outputs
    ]


@pytest.mark.parametrize(
    ("inputs", "outputs", "fraction"),
    [(7, 5, 0.3), (600, 1100, 1.234567e-4), (2048, 300, 0.0031234567), (40000, 40, 2.5e-6)],
)
def test_chirp_z_equals_the_sums_term_by_term(inputs, outputs, fraction):
    """Within 1e-14 of the sum of |a_k|: the round-off the series' error bounds assume (mpmath, 40 digits)."""
    rng = np.random.default_rng(inputs)
    a = (rng.standard_normal(inputs) + 1j * rng.standard_normal(inputs)) * np.exp(-np.arange(inputs) / inputs)
    got = chirp_z(a, outputs, fraction)
    picks = sorted({0, 1, outputs // 2, outputs - 1})
    want = _direct(a, picks, fraction)
    scale = float(np.sum(np.abs(a)))
    for j, w in zip(picks, want, strict=True):
        assert abs(got[j] - w) <= 1e-14 * scale


def test_chirp_z_works_row_by_row():
    a = np.arange(12, dtype=np.complex128).reshape(3, 4)
    both = chirp_z(a, 6, 0.1)
    for row in range(3):
        np.testing.assert_allclose(both[row], chirp_z(a[row], 6, 0.1), rtol=0, atol=1e-12)


def test_tilted_moments_of_the_lattice_model_are_the_derivatives_of_its_log_mgf():
    """Log mgf, tilted mean and variance against mpmath's derivatives of the exact mgf (30 digits)."""
    parent = empirical(np.random.default_rng(4).gamma(4.0, 4.0, 200))
    spectrum = LatticeSpectrum(parent.grid)
    grid = parent.grid
    x = [mpmath.mpf(float(grid.origin + grid.step * j)) for j in range(grid.cells)]
    w = [mpmath.mpf(float(v)) for v in grid.weights]
    h = mpmath.mpf(grid.step)
    anchor = spectrum.high
    mpmath.mp.dps = 30

    def log_mgf(t):
        a = t * h / 2
        spline = 4 * mpmath.log(mpmath.sinh(a) / a) if a != 0 else mpmath.mpf(0)
        return (
            mpmath.log(mpmath.fsum(wj * mpmath.exp(t * (xj - anchor)) for xj, wj in zip(x, w, strict=True)))
            + spline
        )

    thetas = np.array([-3.0, -0.2, 1e-3, 0.05, 0.7, 4.0, 40.0]) / parent.sd()
    k, mean, var = spectrum.tilted_moments(thetas, anchor)
    for t, kk, m, v in zip(thetas.tolist(), k, mean, var, strict=True):
        tt = mpmath.mpf(t)
        assert kk == pytest.approx(float(log_mgf(tt)), rel=1e-12, abs=1e-12)
        assert m == pytest.approx(float(mpmath.diff(log_mgf, tt)), rel=1e-9, abs=1e-9 * parent.sd())
        assert v == pytest.approx(float(mpmath.diff(log_mgf, tt, 2)), rel=1e-8)
    assert math.isfinite(float(k[-1]))
