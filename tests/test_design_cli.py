"""``monitor design tail``, ``limits`` and ``arl --parent``: tails, alarm rates and run lengths under parents.

Witnesses: the Irwin-Hall law evaluated with mpmath (the mean of symmetric triangular readings
is the mean of twice as many uniforms), the exact law of a sum of triangular readings in
rational arithmetic (see tests/spc/test_laws.py), scipy.stats' gamma (the mean of exponential
readings) and normal, and the published CUSUM value 8.38 for k = 0.5, h = 4 at one sigma
(Montgomery and Runger, table of ARLs for a CUSUM with K = 1/2).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from fractions import Fraction

import mpmath
import pytest
from scipy import stats

from monitor.cli import main


def run_json(capsys, *args: str) -> dict[str, object]:
    assert main([*args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_tail_in_the_documented_form_gives_the_exact_tail_and_the_normal_approximation():
    """`monitor design tail ... --json` (a real process): P(mean of 25 >= 18) for triangular(0, 16, 32)."""
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "monitor",
            "design",
            "tail",
            "--parent",
            "triangular:low=0,mode=16,high=32",
            "--n",
            "25",
            "--at",
            "18",
            "--json",
        ],
        capture_output=True,
        text=True,
        check=False,
        timeout=180,
    )
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert {"p_value", "normal_approx", "method"} <= set(out)
    # the mean of 25 symmetric triangular readings on [0, 32] is the mean of 50 uniforms:
    # P(mean >= 18) = P(Irwin-Hall(50) >= 50 * 18 / 32), by the alternating sum with mpmath
    with mpmath.workdps(80):
        u = mpmath.mpf(50) * 18 / 32
        below = mpmath.fsum((-1) ** k * mpmath.binomial(50, k) * (u - k) ** 50 for k in range(int(u) + 1))
        exact = float(1 - below / mpmath.factorial(50))
    assert out["p_value"] == pytest.approx(exact, rel=1e-9)
    sd = math.sqrt(32.0**2 / 24.0)  # variance of a symmetric triangle: width^2 / 24
    assert out["normal_approx"] == pytest.approx(stats.norm.sf(2.0 / (sd / 5.0)), rel=1e-12)
    assert out["method"] == "closed form"
    assert out["parent"] == "triangular(low=0, mode=16, high=32)"


def test_tail_for_a_skewed_parent_is_the_exact_law_and_text_output_is_readable(capsys):
    """Triangular(0, 6, 32), n = 5: the convolution against the exact sum of truncated powers."""
    out = run_json(
        capsys, "design", "tail", "--parent", "triangular:low=0,mode=6,high=32", "--n", "5", "--at", "20"
    )
    a, c, b, n = 0, 6, 32, 5
    big_a, big_b = Fraction(2, (b - a) * (c - a)), Fraction(2, (b - a) * (b - c))
    corners = ((big_a, a), (-(big_a + big_b), c), (big_b, b))
    s = Fraction(20 * n)
    total = Fraction(0)
    for i in range(n + 1):
        for j in range(n - i + 1):
            k = n - i - j
            d = i * a + j * c + k * b
            if s > d:
                count = Fraction(math.factorial(n), math.factorial(i) * math.factorial(j) * math.factorial(k))
                total += (
                    count * corners[0][0] ** i * corners[1][0] ** j * corners[2][0] ** k * (s - d) ** (2 * n)
                )
    exact_upper = 1 - total / math.factorial(2 * n)
    assert out["p_value"] == pytest.approx(float(exact_upper), rel=1e-7)
    assert out["method"] == "convolution"
    assert (
        main(["design", "tail", "--parent", "triangular:low=0,mode=6,high=32", "--n", "5", "--at", "20"]) == 0
    )
    text = capsys.readouterr().out
    assert "P(mean >= 20)" in text
    assert "normal approximation" in text


def test_limits_report_the_true_alarm_rate_and_the_probability_limits(capsys):
    """Exponential(1), n = 4: UCL 2.5 is crossed P(gamma(4, 1/4) > 2.5) of the time (scipy); limits fixed."""
    out = run_json(capsys, "design", "limits", "--parent", "exponential:mean=1", "--n", "4")
    reference = stats.gamma(4, scale=0.25)
    assert out["false_alarm_above"] == pytest.approx(reference.sf(2.5), rel=1e-12)
    assert out["false_alarm_below"] == 0.0
    assert out["normal_limits"] == pytest.approx({"lower": -0.5, "upper": 2.5})
    assert out["nominal_each_side"] == pytest.approx(stats.norm.sf(3.0), rel=1e-12)
    limits = out["probability_limits"]
    assert limits["lower"] == pytest.approx(reference.ppf(0.00135), rel=1e-12)
    assert limits["upper"] == pytest.approx(reference.isf(0.00135), rel=1e-12)
    out = run_json(
        capsys,
        "design",
        "limits",
        "--parent",
        "exponential:mean=1",
        "--n",
        "4",
        "--lower-tail",
        "0.001",
        "--upper-tail",
        "0.0001",
    )
    assert out["probability_limits"]["upper"] == pytest.approx(reference.isf(0.0001), rel=1e-12)
    assert out["probability_limits"]["lower"] == pytest.approx(reference.ppf(0.001), rel=1e-12)


def test_arl_under_a_parent_uses_the_law_of_the_standardized_mean(capsys):
    """Shewhart point rule, exponential readings, n = 4: ARL = 1 / P(beyond) (scipy gamma); normal unchanged."""
    out = run_json(
        capsys,
        "design",
        "arl",
        "--chart",
        "shewhart",
        "--rules",
        "none",
        "--shift",
        "0",
        "--parent",
        "exponential:mean=1",
        "--n",
        "4",
    )
    assert out["arl"] == pytest.approx(1.0 / stats.gamma(4, scale=0.25).sf(2.5), rel=1e-10)
    assert out["parent"] == "exponential(mean=1)"
    normal = run_json(
        capsys,
        "design",
        "arl",
        "--chart",
        "shewhart",
        "--rules",
        "none",
        "--parent",
        "normal:mean=5,sd=2",
        "--n",
        "3",
    )
    assert round(normal["arl"], 1) == 370.4
    cusum = run_json(
        capsys,
        "design",
        "arl",
        "--chart",
        "cusum",
        "--k",
        "0.5",
        "--h",
        "4",
        "--shift",
        "1.0",
        "--parent",
        "normal:mean=0,sd=1",
    )
    assert round(cusum["arl"], 2) == 8.38  # Montgomery and Runger, CUSUM ARL table, K = 1/2, h = 4
    ewma = run_json(
        capsys,
        "design",
        "arl",
        "--chart",
        "ewma",
        "--lambda",
        "0.1",
        "--width",
        "2.814",
        "--parent",
        "uniform:low=0,high=1",
        "--n",
        "5",
    )
    assert ewma["arl"] > 0
    assert ewma["parent"] == "uniform(low=0, high=1)"


def test_a_bad_parent_or_size_is_reported_without_a_traceback(capsys):
    """An unknown family exits with status 1 and says what is allowed; a size of 0 is a usage error."""
    assert main(["design", "tail", "--parent", "gauss:mean=1,sd=2", "--n", "3", "--at", "2"]) == 1
    err = capsys.readouterr().err
    assert "unknown parent 'gauss'" in err
    assert "Traceback" not in err
    with pytest.raises(SystemExit) as stopped:
        main(["design", "limits", "--parent", "exponential:mean=1", "--n", "0"])
    assert stopped.value.code == 2
    assert "at least 1" in capsys.readouterr().err
