"""Benchmark: exact laws of chart statistics for non-normal parents (``monitor.spc.laws``).

Times, each case in a fresh interpreter so that "cold" means the first build in a process
(imports done before the clock starts):

* the law of a subgroup mean (``law_of_mean``): n = 25 from a symmetric triangular parent
  (closed form: a Bates law), a skewed triangular one and an empirical one built from 500
  baseline readings (both by Fourier series of characteristic functions), lognormal ones
  for n = 5 and 25 and a Weibull one (convolution in x by quadrature);
* the law of the EWMA and of the sd for a lognormal parent;
* the p-value of one beyond-limits signal on the mean once its law is cached
  (``signal_p_value`` with a ``LawCache``), against the normal-theory p-value
  (``monitor.spc.pvalues.p_value``) in the same run;
* the in-control ARL of a Shewhart chart with the Western Electric rules, and of an EWMA and
  a CUSUM, under the skewed triangular parent's law of the mean of 5 (Markov chains refined
  to about four significant digits).

Run alone: ``python scripts/bench/laws.py`` prints a table. The bench suite imports ``run``.
Nothing here asserts on speed; the figures are for people.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
PYTHON = sys.executable

PROBE = r"""
import json, statistics, sys, time
import numpy as np
from monitor.spc import Subgroup, XbarRChart
from monitor.spc.laws import LawCache, law_of_ewma, law_of_mean, law_of_sd, signal_p_value
from monitor.spc.parents import empirical, parse_parent
from monitor.spc.pvalues import p_value

kind, which, n, repeats = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
if which == "empirical":
    parent = empirical(np.random.default_rng(4).gamma(4.0, 4.0, 500))
else:
    parent = parse_parent(which)
build = {"mean": law_of_mean, "sd": law_of_sd, "ewma": lambda p, k: law_of_ewma(p, k, 0.2)}[kind]
t0 = time.perf_counter()
law = build(parent, n)
cold = time.perf_counter() - t0
again = []
for _ in range(repeats):
    t0 = time.perf_counter()
    build(parent, n)
    again.append(time.perf_counter() - t0)
# a new parent in a warm process (the daemon's case: another chart, another baseline)
fresh = []
for k in range(1, 6):
    if which == "empirical":
        other = empirical(np.random.default_rng(4 + k).gamma(4.0, 4.0, 500))
    else:
        other = parse_parent(which)
        other = type(other).of(other.name, **{key: value * (1.0 + 0.01 * k) for key, value in other.params})
    t0 = time.perf_counter()
    build(other, n)
    fresh.append(time.perf_counter() - t0)
out = {"method": law.method, "cold": cold, "again": statistics.median(again),
       "fresh": statistics.median(fresh), "error_bound": law.error_bound,
       "floor": getattr(law, "tail_floor", 0.0)}
if kind == "mean":
    mean, sd = parent.mean(), parent.sd()
    chart = XbarRChart(mean=mean, sigma=sd)
    high = mean + 4.0 * sd / n ** 0.5
    signals = chart.update(Subgroup(tuple(high + 0.01 * sd * (k % 3) for k in range(n))))
    signal = next(s for s in signals if s.statistic.value == "mean")
    cache = LawCache()
    t0 = time.perf_counter()
    first = signal_p_value(signal, parent=parent, n=n, cache=cache)
    out["first_p"] = time.perf_counter() - t0
    def per_call(work, count=2000):
        runs = []
        for _ in range(5):
            t0 = time.perf_counter()
            for _ in range(count):
                work()
            runs.append((time.perf_counter() - t0) / count)
        return statistics.median(runs)
    out["cached_p"] = per_call(lambda: signal_p_value(signal, parent=parent, n=n, cache=cache))
    out["normal_p"] = per_call(lambda: p_value(signal, n=n))
    out["p"] = first.value
    out["p_normal"] = p_value(signal, n=n).value
print(json.dumps(out))
"""

ARL_PROBE = r"""
import json, time
from monitor.spc.arl import cusum_arl, ewma_arl, shewhart_arl
from monitor.spc.laws import standardized_mean_cdf
from monitor.spc.parents import parse_parent
from monitor.spc.rules import western_electric
parent = parse_parent("triangular:low=0,mode=6,high=32")
t0 = time.perf_counter()
cdf = standardized_mean_cdf(parent, 5)
law_time = time.perf_counter() - t0
out = {"law": law_time}
for name, work in (
    ("shewhart", lambda: shewhart_arl(western_electric(), cdf=cdf)),
    ("ewma", lambda: ewma_arl(0.1, 2.814, cdf=cdf)),
    ("cusum", lambda: cusum_arl(0.5, 5.0, cdf=cdf)),
):
    t0 = time.perf_counter()
    result = work()
    out[name] = {"seconds": time.perf_counter() - t0, "arl": result.arl, "error": result.error}
print(json.dumps(out))
"""

MEANS = (
    ("triangular, symmetric, n = 25", "mean", "triangular:low=0,mode=16,high=32", 25),
    ("triangular, skewed, n = 25", "mean", "triangular:low=0,mode=6,high=32", 25),
    ("empirical (500 gamma readings), n = 25", "mean", "empirical", 25),
    ("lognormal (log sd 0.5), n = 5", "mean", "lognormal:log_mean=0,log_sd=0.5", 5),
    ("lognormal (log sd 0.5), n = 25", "mean", "lognormal:log_mean=0,log_sd=0.5", 25),
    ("Weibull (shape 1.5), n = 25", "mean", "weibull:shape=1.5,scale=10", 25),
)
OTHERS = (
    ("law of the EWMA (lambda 0.2), lognormal, n = 5", "ewma", "lognormal:log_mean=0,log_sd=0.5", 5),
    ("law of the sd, skewed triangular, n = 5", "sd", "triangular:low=0,mode=6,high=32", 5),
)


@dataclass
class _Row:
    bench: str
    case: str
    measured: str
    reference: str
    ratio: str
    target: str
    verdict: str
    runs: str = ""


def _probe(script: str, *args: str) -> dict[str, object] | str:
    done = subprocess.run(
        [PYTHON, "-c", script, *args], cwd=REPO, capture_output=True, text=True, check=False, timeout=900
    )
    if done.returncode != 0:
        return (done.stderr.strip().splitlines() or ["?"])[-1][:160]
    return json.loads(done.stdout.strip().splitlines()[-1])


def _rows(repeats: int) -> tuple[list[_Row], list[str]]:
    rows: list[_Row] = []
    notes: list[str] = []
    for label, kind, parent, n in MEANS + OTHERS:
        t = _probe(PROBE, kind, parent, str(n), str(repeats))
        case = f"law of the mean, {label}" if kind == "mean" else label
        if isinstance(t, str):
            rows.append(_Row("laws", case, f"failed: {t}", "", "", "", "?"))
            continue
        rows.append(
            _Row(
                "laws",
                f"{case} ({t['method']})",
                f"cold {1e3 * t['cold']:.1f} ms, again {1e3 * t['again']:.1f} ms, "
                f"new parent {1e3 * t['fresh']:.1f} ms",
                "",
                "",
                "",
                "",
            )
        )
        notes.append(f"{case}: error bound {t['error_bound']:.2g}, tails kept to {t['floor']:.2g}")
        if kind == "mean":
            rows.append(
                _Row(
                    "laws",
                    f"p-value of a beyond-limits mean, law cached, {label}",
                    f"{1e6 * t['cached_p']:.1f} us (first, building the law: {1e3 * t['first_p']:.1f} ms)",
                    f"normal-theory p-value {1e6 * t['normal_p']:.1f} us",
                    f"{t['cached_p'] / t['normal_p']:.1f}x",
                    "",
                    "",
                )
            )
            notes.append(f"{label}: p-value {t['p']:.3g} (normal theory {t['p_normal']:.3g})")
    t = _probe(ARL_PROBE)
    if isinstance(t, str):
        rows.append(_Row("laws", "ARL under a parent", f"failed: {t}", "", "", "", "?"))
    else:
        law_ms = 1e3 * float(t["law"])  # type: ignore[arg-type]
        for name, label in (
            ("shewhart", "Shewhart, Western Electric rules"),
            ("ewma", "EWMA 0.1, 2.814"),
            ("cusum", "CUSUM 0.5, 5"),
        ):
            item = t[name]
            if not isinstance(item, dict):
                continue
            rows.append(
                _Row(
                    "laws",
                    f"in-control ARL, {label}, skewed triangular mean of 5",
                    f"{1e3 * item['seconds']:.1f} ms (ARL {item['arl']:.4g})",
                    f"law of the mean built first: {law_ms:.1f} ms",
                    "",
                    "",
                    "",
                )
            )
    return rows, notes


def run(report: object, args: object) -> None:
    """Add this benchmark's rows and notes to the bench suite's report."""
    from common import Row  # noqa: PLC0415 - the suite's own table type

    rows, notes = _rows(max(1, int(getattr(args, "core_runs", 3))))
    for r in rows:
        report.add(Row(r.bench, r.case, r.measured, r.reference, r.ratio, r.target, r.verdict))  # type: ignore[attr-defined]
    for text in notes:
        report.note(text)  # type: ignore[attr-defined]


def main() -> None:
    """Print the table."""
    parser = argparse.ArgumentParser(description="Benchmark the exact laws of chart statistics.")
    parser.add_argument("--repeats", type=int, default=3, help="builds after the first, median shown")
    args = parser.parse_args()
    rows, notes = _rows(args.repeats)
    head = ("case", "measured (median)", "reference, same run", "ratio")
    body = [(r.case, r.measured, r.reference, r.ratio) for r in rows]
    widths = [max(len(str(x[i])) for x in [head, *body]) for i in range(len(head))]
    print(" | ".join(c.ljust(w) for c, w in zip(head, widths, strict=True)))
    print("-+-".join("-" * w for w in widths))
    for line in body:
        print(" | ".join(str(c).ljust(w) for c, w in zip(line, widths, strict=True)))
    print()
    for text in notes:
        print(f"  {text}")
    print(
        f"\n(again: median of {args.repeats} builds after the first; new parent: median of 5 builds "
        "for slightly different parents in the same warm process; each case in its own process)"
    )


if __name__ == "__main__":
    main()
