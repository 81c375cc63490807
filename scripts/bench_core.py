"""Speed of the statistical core: vectorised batch paths and the streaming update.

Targets: batch path >= 10 million readings/s for X-bar/R (n = 5, all Western Electric rules)
and for EWMA (one reading per subgroup), on one core; streaming ``update`` <= 20 us per
subgroup for X-bar/R with all Western Electric rules. Prints the median of several runs.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time
from collections.abc import Callable

import numpy as np

from monitor.spc import (
    ChartKind,
    ChartSet,
    ChartSpec,
    CusumChart,
    EwmaChart,
    ProcessParameters,
    Subgroup,
    SubgroupBatch,
    XbarRChart,
    western_electric,
)


def best_of(runs: int, work: Callable[[], None]) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--readings", type=int, default=10_000_000)
    parser.add_argument("--runs", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    n = 5
    readings = args.readings - args.readings % n
    rows = rng.normal(10.0, 1.0, size=(readings // n, n))
    singles = rng.normal(10.0, 1.0, size=readings)
    rows_batch = SubgroupBatch.from_rows(rows)
    single_batch = SubgroupBatch.from_rows(singles)

    def xbar_batch() -> None:
        XbarRChart(mean=10.0, sigma=1.0, rules=western_electric()).update_many(SubgroupBatch.from_rows(rows))

    def ewma_batch() -> None:
        EwmaChart(mean=10.0, sigma=1.0, smoothing=0.2).update_many(SubgroupBatch.from_rows(singles))

    def cusum_batch() -> None:
        CusumChart(mean=10.0, sigma=1.0).update_many(SubgroupBatch.from_rows(singles))

    def set_batch() -> None:
        spec = ChartSpec(
            kinds=(ChartKind.XBAR_R, ChartKind.EWMA, ChartKind.CUSUM),
            standard=ProcessParameters(10.0, 1.0),
        )
        ChartSet(spec).update_many(SubgroupBatch.from_rows(rows))

    stream_count = 100_000
    subgroups = [Subgroup(tuple(r)) for r in rows[:stream_count].tolist()]

    def xbar_stream() -> None:
        chart = XbarRChart(mean=10.0, sigma=1.0, rules=western_electric())
        for s in subgroups:
            chart.update(s)

    def set_stream() -> None:
        spec = ChartSpec(
            kinds=(ChartKind.XBAR_R, ChartKind.EWMA, ChartKind.CUSUM),
            standard=ProcessParameters(10.0, 1.0),
        )
        chart_set = ChartSet(spec)
        for s in subgroups:
            chart_set.update(s)

    del rows_batch, single_batch
    machine = f"{platform.machine()}, {os.cpu_count()} cpus"
    print(f"machine: {machine}, Python {platform.python_version()}, numpy {np.__version__}")
    print(f"{'path':58s} {'result':>18s}")
    for label, work, count, unit in (
        ("batch X-bar/R n=5, Western Electric rules", xbar_batch, readings, "readings/s"),
        ("batch EWMA, one reading per subgroup", ewma_batch, readings, "readings/s"),
        ("batch CUSUM, one reading per subgroup", cusum_batch, readings, "readings/s"),
        ("batch chart set X-bar/R + EWMA + CUSUM, n=5", set_batch, readings, "readings/s"),
    ):
        seconds = best_of(args.runs, work)
        print(f"{label:58s} {count / seconds / 1e6:11.1f} M {unit}")
    for label, work in (
        ("streaming X-bar/R n=5, Western Electric rules", xbar_stream),
        ("streaming chart set X-bar/R + EWMA + CUSUM, n=5", set_stream),
    ):
        seconds = best_of(args.runs, work)
        print(f"{label:58s} {seconds / stream_count * 1e6:11.2f} us/subgroup")


if __name__ == "__main__":
    main()
