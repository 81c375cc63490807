"""Control-chart constants against published tables and independent computations.

Sources and witnesses:

* the printed table of factors: Montgomery, *Introduction to Statistical Quality Control*,
  Appendix VI (the same values appear in ASTM E2587); typed in from memory, so every printed
  value is compared at +/-1 in its last printed digit;
* closed forms: d2(2) = 2/sqrt(pi), d2(3) = 3/sqrt(pi), d3(2) = sqrt(2 - 4/pi),
  c4(2) = sqrt(2/pi), c4(3) = sqrt(pi)/2 (standard results for the range and the sample
  standard deviation of normal samples);
* mpmath: d2 by high-precision quadrature of its defining integral, and E[W^2] by a double
  integral over the joint law of the sample minimum and maximum -- a different formula from
  the one the code integrates (the code goes through the distribution function of W);
* scipy.special.gamma for c4, and a seeded Monte Carlo for d2, d3 and c4.
"""

from __future__ import annotations

import itertools
import math

import mpmath as mp
import numpy as np
import pytest
from scipy import special

from monitor.spc import ConfigError, constants

# ---------------------------------------------------------------- the printed table

# Montgomery, Introduction to Statistical Quality Control, Appendix VI (same values in
# ASTM E2587). Values from memory. Columns: n, A2, A3, c4, B3, B4, d2, d3, D3, D4.
# A printed 0 in B3 or D3 means the 3-sigma lower factor is negative and is floored at 0.
PRINTED_TABLE = """
 2 1.880 2.659 0.7979 0     3.267 1.128 0.853 0     3.267
 3 1.023 1.954 0.8862 0     2.568 1.693 0.888 0     2.574
 4 0.729 1.628 0.9213 0     2.266 2.059 0.880 0     2.282
 5 0.577 1.427 0.9400 0     2.089 2.326 0.864 0     2.114
 6 0.483 1.287 0.9515 0.030 1.970 2.534 0.848 0     2.004
 7 0.419 1.182 0.9594 0.118 1.882 2.704 0.833 0.076 1.924
 8 0.373 1.099 0.9650 0.185 1.815 2.847 0.820 0.136 1.864
 9 0.337 1.032 0.9693 0.239 1.761 2.970 0.808 0.184 1.816
10 0.308 0.975 0.9727 0.284 1.716 3.078 0.797 0.223 1.777
11 0.285 0.927 0.9754 0.321 1.679 3.173 0.787 0.256 1.744
12 0.266 0.886 0.9776 0.354 1.646 3.258 0.778 0.283 1.717
13 0.249 0.850 0.9794 0.382 1.618 3.336 0.770 0.307 1.693
14 0.235 0.817 0.9810 0.406 1.594 3.407 0.763 0.328 1.672
15 0.223 0.789 0.9823 0.428 1.572 3.472 0.756 0.347 1.653
16 0.212 0.763 0.9835 0.448 1.552 3.532 0.750 0.363 1.637
17 0.203 0.739 0.9845 0.466 1.534 3.588 0.744 0.378 1.622
18 0.194 0.718 0.9854 0.482 1.518 3.640 0.739 0.391 1.608
19 0.187 0.698 0.9862 0.497 1.503 3.689 0.734 0.403 1.597
20 0.180 0.680 0.9869 0.510 1.490 3.735 0.729 0.415 1.585
21 0.173 0.663 0.9876 0.523 1.477 3.778 0.724 0.425 1.575
22 0.167 0.647 0.9882 0.534 1.466 3.819 0.720 0.434 1.566
23 0.162 0.633 0.9887 0.545 1.455 3.858 0.716 0.443 1.557
24 0.157 0.619 0.9892 0.555 1.445 3.895 0.712 0.451 1.548
25 0.153 0.606 0.9896 0.565 1.435 3.931 0.708 0.459 1.541
"""
COLUMNS = ("A2", "A3", "c4", "B3", "B4", "d2", "d3", "D3", "D4")


def _printed_rows() -> dict[int, dict[str, str]]:
    rows: dict[int, dict[str, str]] = {}
    for line in PRINTED_TABLE.strip().splitlines():
        n, *cells = line.split()
        rows[int(n)] = dict(zip(COLUMNS, cells, strict=True))
    return rows


PRINTED = _printed_rows()


def _last_digit(printed: str) -> float:
    """One unit in the last printed digit of a table entry."""
    decimals = len(printed.partition(".")[2])
    return 10.0**-decimals


@pytest.mark.parametrize("n", sorted(PRINTED))
def test_every_column_matches_the_printed_table_within_one_in_the_last_digit(n):
    """Each constant agrees with the printed table at +/-1 in its last printed digit."""
    k = constants(n)
    wrong = []
    for column, printed in PRINTED[n].items():
        value = getattr(k, column)
        if printed == "0":
            # the table floors a negative lower factor to 0; so must the code
            if value != 0.0:
                wrong.append(f"{column}: printed 0, got {value!r}")
        elif abs(value - float(printed)) > _last_digit(printed) * (1 + 1e-9):
            wrong.append(f"{column}: printed {printed}, got {value:.6f}")
    assert not wrong, f"n={n}: " + "; ".join(wrong)


def test_printed_zero_lower_factors_are_exactly_where_the_formula_goes_negative():
    """B3 and D3 are 0 exactly for the sizes where 1 - 3 sqrt(1-c4^2)/c4 and 1 - 3 d3/d2 < 0."""
    for n, row in PRINTED.items():
        k = constants(n)
        assert (row["B3"] == "0") == (1 - 3 * math.sqrt(1 - k.c4**2) / k.c4 < 0), n
        assert (row["D3"] == "0") == (1 - 3 * k.d3 / k.d2 < 0), n


def test_precise_values_for_subgroups_of_five_match_to_their_printed_digits():
    """d2(5)=2.325929, d3(5)=0.864082, c4(5)=0.939986, A2(5)=0.57682 to +/-1 in the last digit."""
    # Montgomery, Appendix VI, as quoted to 6 significant digits; values from memory.
    k = constants(5)
    d2, d3, c4, a2 = k.d2, k.d3, k.c4, k.A2
    assert d2 == pytest.approx(2.325929, abs=1e-6)
    assert d3 == pytest.approx(0.864082, abs=1e-6)
    assert c4 == pytest.approx(0.939986, abs=1e-6)
    assert a2 == pytest.approx(0.57682, abs=1e-5)


def test_e2_is_three_over_d2_and_is_2_65868_for_pairs():
    """E2 = 3/d2 for every n; E2(2) = 2.65868 (printed 2.660 when taken from d2 = 1.128)."""
    # Individuals-chart factor E2 = 3/d2: common practice, no source. The often printed
    # 2.660 is 3/1.128, i.e. computed from the rounded d2; the exact value is 2.65868.
    for n in range(2, 26):
        k = constants(n)
        e2 = k.E2
        assert e2 == pytest.approx(3.0 / k.d2, rel=1e-14)
    e2_pairs = constants(2).E2
    assert e2_pairs == pytest.approx(2.65868, abs=1e-5)
    assert e2_pairs == pytest.approx(3.0 / (2.0 / math.sqrt(math.pi)), rel=1e-12)


def test_chart_factors_follow_from_d2_d3_and_c4():
    """A2, A3, B3, B4, D3, D4 are the 3-sigma expressions in d2, d3 and c4 (ASTM E2587 forms)."""
    # A2 = 3/(d2 sqrt n), A3 = 3/(c4 sqrt n), B3/B4 = 1 -/+ 3 sqrt(1-c4^2)/c4,
    # D3/D4 = 1 -/+ 3 d3/d2, lower ones floored at 0 (Montgomery, Appendix VI notes).
    for n in (2, 3, 6, 10, 25, 40, 100):
        k = constants(n)
        spread_s = 3 * math.sqrt(1 - k.c4**2) / k.c4
        spread_r = 3 * k.d3 / k.d2
        factors = {name: getattr(k, name) for name in ("A2", "A3", "B3", "B4", "D3", "D4")}
        expected = {
            "A2": 3 / (k.d2 * math.sqrt(n)),
            "A3": 3 / (k.c4 * math.sqrt(n)),
            "B3": max(0.0, 1 - spread_s),
            "B4": 1 + spread_s,
            "D3": max(0.0, 1 - spread_r),
            "D4": 1 + spread_r,
        }
        assert k.n == n
        assert factors == pytest.approx(expected, rel=1e-13, abs=1e-13)


# ---------------------------------------------------------------- closed forms


def test_closed_forms_for_pairs_and_triples():
    """d2(2)=2/sqrt(pi), d2(3)=3/sqrt(pi), d3(2)=sqrt(2-4/pi), c4(2)=sqrt(2/pi), c4(3)=sqrt(pi)/2."""
    # Range of two normals: W = sqrt(2)|Z|, so E W = 2/sqrt(pi) and E W^2 = 2.
    # Range of three: E W = 3/sqrt(pi). S of n normals: c4 = sqrt(2/(n-1)) G(n/2)/G((n-1)/2).
    # Standard results (e.g. Montgomery, Appendix VI derivations); value from memory for d2(3).
    two, three = constants(2), constants(3)
    assert two.d2 == pytest.approx(2 / math.sqrt(math.pi), rel=1e-12)
    assert three.d2 == pytest.approx(3 / math.sqrt(math.pi), rel=1e-12)
    assert two.d3 == pytest.approx(math.sqrt(2 - 4 / math.pi), rel=1e-10)
    assert two.c4 == pytest.approx(math.sqrt(2 / math.pi), rel=1e-13)
    assert three.c4 == pytest.approx(math.sqrt(math.pi) / 2, rel=1e-13)


@pytest.mark.parametrize("n", [2, 3, 5, 10, 25, 50, 100, 150])
def test_c4_matches_the_gamma_function_formula_from_scipy(n):
    """c4(n) = sqrt(2/(n-1)) * Gamma(n/2) / Gamma((n-1)/2), with scipy.special.gamma directly."""
    expected = math.sqrt(2.0 / (n - 1)) * special.gamma(n / 2) / special.gamma((n - 1) / 2)
    assert constants(n).c4 == pytest.approx(expected, rel=1e-12)


# ---------------------------------------------------------------- mpmath quadrature


def _gauss_legendre_panels(edges: list[float], order: int) -> tuple[list, list]:
    """Composite Gauss-Legendre nodes and weights (as mpmath numbers) over the given panels."""
    nodes, weights = np.polynomial.legendre.leggauss(order)
    xs, ws = [], []
    for a, b in itertools.pairwise(edges):
        half = (mp.mpf(b) - mp.mpf(a)) / 2
        xs += [mp.mpf(a) + half * (mp.mpf(t) + 1) for t in nodes]
        ws += [half * mp.mpf(w) for w in weights]
    return xs, ws


def _mpmath_d2(n: int) -> mp.mpf:
    """d2 = integral of 1 - Phi(x)^n - (1 - Phi(x))^n over the real line (even integrand)."""

    def integrand(x):
        return 1 - mp.ncdf(x) ** n - mp.ncdf(-x) ** n

    return 2 * mp.quad(integrand, [0, 2, 4, 8, mp.inf])


def _mpmath_range_second_moment(n: int) -> mp.mpf:
    """E[W^2] = 2 * double integral over x < y of P(min < x, max > y).

    P(min < x, max > y) = 1 - Phi(y)^n - (1 - Phi(x))^n + (Phi(y) - Phi(x))^n; with y = x + w
    the integrand is negligible outside |x| < 12, 0 < w < 13 (normal tails below 1e-30).
    """
    xs, wx = _gauss_legendre_panels([-12, -9, -6, -3, 0, 3, 6, 9, 12], 16)
    ws, ww = _gauss_legendre_panels([0, 1, 2, 3, 4, 5, 6, 8, 10, 13], 16)
    phi_x = [mp.ncdf(x) for x in xs]
    tail_x = [mp.ncdf(-x) ** n for x in xs]
    total = mp.mpf(0)
    for w, weight_w in zip(ws, ww, strict=True):
        inner = mp.mpf(0)
        for x, weight_x, p, tail in zip(xs, wx, phi_x, tail_x, strict=True):
            q = mp.ncdf(x + w)
            inner += weight_x * (1 - q**n - tail + (q - p) ** n)
        total += weight_w * inner
    return 2 * total


@pytest.mark.parametrize("n", [2, 5, 7, 25, 30, 50, 100])
def test_d2_matches_mpmath_quadrature_of_its_defining_integral(n):
    """d2(n) agrees with an mpmath quadrature of its defining integral to 1e-9."""
    with mp.workdps(20):
        expected = float(_mpmath_d2(n))
    assert constants(n).d2 == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("n", [5, 30, 50])
def test_d3_matches_mpmath_double_integral_over_minimum_and_maximum(n):
    """d3(n) agrees to 1e-7 with sqrt(E[W^2] - d2^2) from the min/max double integral in mpmath."""
    with mp.workdps(15):
        mean = _mpmath_d2(n)
        second = _mpmath_range_second_moment(n)
        expected = float(mp.sqrt(second - mean * mean))
    assert constants(n).d3 == pytest.approx(expected, abs=1e-7)


def test_the_remembered_table_itself_agrees_with_mpmath_and_scipy_where_they_reach():
    """The printed d2, c4, A2, A3, B3, B4 columns match mpmath d2 and scipy-gamma c4 (+/-1)."""
    # This checks the table typed in from memory against computations that share nothing
    # with the code, so the comparison of the code with the table does not rest on memory
    # alone. d3, D3 and D4 are confirmed through the mpmath double integral above.
    wrong = []
    with mp.workdps(20):
        for n, row in PRINTED.items():
            d2 = float(_mpmath_d2(n))
            c4 = math.sqrt(2 / (n - 1)) * special.gamma(n / 2) / special.gamma((n - 1) / 2)
            spread_s = 3 * math.sqrt(1 - c4 * c4) / c4
            independent = {
                "d2": d2,
                "c4": c4,
                "A2": 3 / (d2 * math.sqrt(n)),
                "A3": 3 / (c4 * math.sqrt(n)),
                "B3": max(0.0, 1 - spread_s),
                "B4": 1 + spread_s,
            }
            for column, value in independent.items():
                printed = row[column]
                unit = _last_digit(printed) if printed != "0" else 1e-12
                if abs(value - float(printed)) > unit * (1 + 1e-9):
                    wrong.append(f"n={n} {column}: printed {printed}, independent {value:.6f}")
    assert not wrong, "; ".join(wrong)


# ---------------------------------------------------------------- Monte Carlo


@pytest.mark.parametrize(("n", "subgroups", "seed"), [(7, 200_000, 7001), (40, 50_000, 4001)])
def test_d2_d3_and_c4_agree_with_a_seeded_monte_carlo(n, subgroups, seed):
    """Simulated mean range, sd of the range and mean sd land within 4 standard errors."""
    # Definitions: d2 = E[R/sigma], d3 = sd(R/sigma), c4 = E[S/sigma] for normal subgroups
    # (Montgomery, Appendix VI). Seeded, so the outcome is deterministic.
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((subgroups, n))
    ranges = x.max(axis=1) - x.min(axis=1)
    sds = x.std(axis=1, ddof=1)
    k = constants(n)

    se_mean_range = ranges.std(ddof=1) / math.sqrt(subgroups)
    assert abs(ranges.mean() - k.d2) < 4 * se_mean_range

    # standard error of a sample sd by the delta method: sqrt((m4 - s^4) / N) / (2 s)
    centred = ranges - ranges.mean()
    s = centred.std(ddof=1)
    se_sd = math.sqrt((np.mean(centred**4) - s**4) / subgroups) / (2 * s)
    assert abs(s - k.d3) < 4 * se_sd

    se_mean_sd = sds.std(ddof=1) / math.sqrt(subgroups)
    assert abs(sds.mean() - k.c4) < 4 * se_mean_sd


# ---------------------------------------------------------------- bad sizes


@pytest.mark.parametrize("bad", [0, 1, -3, 2.5, 5.0, True, "5", None])
def test_sizes_that_are_not_integers_of_at_least_two_raise_config_error(bad):
    """constants() refuses sizes other than integers >= 2 and names what is allowed."""
    with pytest.raises(ConfigError, match="integer of at least 2"):
        constants(bad)


def test_config_error_is_a_value_error():
    """A bad size is also a ValueError, so generic callers can catch it."""
    with pytest.raises(ValueError, match="subgroup size"):
        constants(1)
