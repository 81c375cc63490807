"""Speed of the ARL computations (monitor.spc.arl): time per ARL, to their stated accuracy.

Target: <= 100 ms per ARL to three significant digits for a Shewhart chart with the Western
Electric rules, an EWMA and a CUSUM. "cold" clears the caches first (the rule automaton is
built once per rule set and limit), "warm" is the median of repeated calls. Design and p-value
helpers are timed for information. Run: .venv/bin/python scripts/bench_arl.py [--runs N]

BLAS runs single-threaded here unless the environment says otherwise: the chains are small
(a few hundred states), and on a busy two-core machine threaded BLAS made a 1 ms solve take
100 ms.
"""

from __future__ import annotations

import os

for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import argparse  # noqa: E402 - after the thread settings, which must precede numpy
import math  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
from collections.abc import Callable  # noqa: E402

import numpy as np  # noqa: E402
from scipy import stats  # noqa: E402

from monitor.spc import arl  # noqa: E402
from monitor.spc.arl import (  # noqa: E402
    Design,
    RunLength,
    cusum_arl,
    cusum_decision_interval,
    cusum_tail,
    ewma_arl,
    ewma_tail,
    ewma_width,
    recommend_cusum,
    recommend_ewma,
    shewhart_arl,
)
from monitor.spc.rules import Rule, nelson, western_electric  # noqa: E402

TARGET_MS = 100.0


def clear_caches() -> None:
    arl._zone_chain.cache_clear()
    arl._order_rules.cache_clear()


def timed(work: Callable[[], object], runs: int) -> tuple[object, float, float]:
    clear_caches()
    start = time.perf_counter()
    result = work()
    cold = time.perf_counter() - start
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return result, cold * 1e3, statistics.median(times) * 1e3


def gamma_mean_cdf(n: int) -> Callable[[np.ndarray], np.ndarray]:
    def cdf(z: np.ndarray) -> np.ndarray:
        return np.asarray(stats.gamma.cdf(1.0 + z / math.sqrt(n), a=n, scale=1.0 / n), dtype=np.float64)

    return cdf


def describe(result: object) -> str:
    if isinstance(result, RunLength):
        digits = "exact" if not result.error else f"+/-{result.error / result.arl:.1e}"
        states = "" if result.states is None else f"{result.states}"
        return f"{result.arl:10.4g} {digits:>11s} {states:>6s} {result.method}"
    if isinstance(result, Design):
        params = ", ".join(f"{k}={v:.4g}" for k, v in result.params.items())
        return f"{result.arl1:10.4g} {'(ARL1)':>11s} {'':>6s} {result.chart}: {params}"
    if isinstance(result, float):
        return f"{result:10.4g}"
    return str(result)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=5)
    args = parser.parse_args()
    gamma4 = gamma_mean_cdf(4)
    cases: list[tuple[str, Callable[[], object], bool]] = [
        ("Shewhart 3-sigma, in control (closed form)", lambda: shewhart_arl([Rule.beyond_limits()]), True),
        ("Shewhart + Western Electric, in control", lambda: shewhart_arl(western_electric()), True),
        (
            "Shewhart + Western Electric, 1-sigma shift",
            lambda: shewhart_arl(western_electric(), shift=1.0),
            True,
        ),
        (
            "Shewhart + Western Electric, gamma n=4 means",
            lambda: shewhart_arl(western_electric(), cdf=gamma4),
            True,
        ),
        (
            "trend 6 + alternating 14 alone (rank recursion)",
            lambda: shewhart_arl([Rule.steady_trend(6), Rule.alternating_run(14)]),
            False,
        ),
        ("Nelson set (simulation, 200 000 runs)", lambda: shewhart_arl(nelson()), False),
        ("EWMA lambda=0.1 L=2.814, in control", lambda: ewma_arl(0.1, 2.814), True),
        ("EWMA lambda=0.1 L=2.814, 1-sigma shift", lambda: ewma_arl(0.1, 2.814, shift=1.0), True),
        ("EWMA lambda=0.05 L=2.615, in control", lambda: ewma_arl(0.05, 2.615), True),
        (
            "EWMA lambda=0.1, exact limits + fast initial response",
            lambda: ewma_arl(0.1, 2.814, time_varying_limits=True, fast_initial_response=True),
            False,
        ),
        ("CUSUM k=0.5 h=5 two-sided, in control", lambda: cusum_arl(0.5, 5.0), True),
        ("CUSUM k=0.5 h=5 two-sided, 1-sigma shift", lambda: cusum_arl(0.5, 5.0, shift=1.0), True),
        ("CUSUM k=0.5 h=5, head start h/2", lambda: cusum_arl(0.5, 5.0, head_start=2.5), True),
        ("CUSUM k=0.5 h=5, gamma n=4 means", lambda: cusum_arl(0.5, 5.0, cdf=gamma4), True),
        ("CUSUM k=0.5 h=5, head start 4 (joint chain)", lambda: cusum_arl(0.5, 5.0, head_start=4.0), False),
        ("design: ewma_width(0.1, 500)", lambda: ewma_width(0.1, 500.0), False),
        ("design: cusum_decision_interval(0.5, 465)", lambda: cusum_decision_interval(0.5, 465.0), False),
        ("design: recommend_ewma(500, 1) over 10 weights", lambda: recommend_ewma(500.0, 1.0), False),
        ("design: recommend_cusum(465, 1)", lambda: recommend_cusum(465.0, 1.0), False),
        ("p-value: cusum_tail stationary, c=5", lambda: cusum_tail(0.5, 5.0, 5.0), False),
        (
            "p-value: cusum_tail after 100 subgroups, c=5",
            lambda: cusum_tail(0.5, 5.0, 5.0, subgroups_since_start=100),
            False,
        ),
        ("p-value: ewma_tail gamma n=4, stationary", lambda: ewma_tail(0.2, 0.9, cdf=gamma4), False),
    ]
    machine = f"{platform.machine()}, {os.cpu_count()} cpus"
    print(f"machine: {machine}, Python {platform.python_version()}, numpy {np.__version__}")
    print(f"BLAS threads: {os.environ['OPENBLAS_NUM_THREADS']}")
    print(f"target: <= {TARGET_MS:.0f} ms per ARL (cases marked *)")
    columns = f"{'result':>10s} {'rel.error':>11s} {'states':>6s} method"
    header = f"{'case':58s} {'cold ms':>8s} {'warm ms':>8s}  {columns}"
    print(header)
    print("-" * len(header))
    for label, work, targeted in cases:
        result, cold, warm = timed(work, args.runs)
        mark = "*" if targeted else " "
        flag = "  OVER TARGET" if targeted and warm > TARGET_MS else ""
        print(f"{mark}{label:57s} {cold:8.1f} {warm:8.1f}  {describe(result)}{flag}")


if __name__ == "__main__":
    main()
