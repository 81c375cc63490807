"""Speed of the daemon, end to end: the entry point of ``scripts/bench/run`` (a benchmark, not a test).

Each benchmark measures the daemon and its reference side by side in the same run (figures on a
shared two-core machine move by +-30 % from run to run, so only same-run ratios compare) and
prints one table at the end, with the machine it ran on. Nothing here asserts on speed.

The five benchmarks (docs/speed.md has the targets and the last results):

    ingest   the daemon process against a bare counting aiomqtt client, SQLite and PostgreSQL,
             one reading and 100 readings per message
    latency  publish -> alert at half the measured capacity, broker with and without set_tcp_nodelay
    replay   ``monitor replay`` of 10 million readings, CSV and Parquet
    charts   10,000 charts fed round-robin: throughput and resident memory per chart
    laws     exact laws of the subgroup mean and the per-signal p-value (scripts/bench/laws.py)

and, only when named with --only, diagnostics: ``stages`` (the daemon's per-message work
in-process, stage by stage, against the bare drivers), ``core`` and ``arl`` (scripts/bench_core.py,
scripts/bench_arl.py).

    scripts/bench/run                         # the five (about 15 minutes here)
    scripts/bench/run --only ingest latency   # some of them
    scripts/bench/run --quick                 # fewer and shorter runs (about 4 minutes)
    .venv/bin/python scripts/bench/profile_daemon.py --shape batch   # where the daemon's time goes
"""

from __future__ import annotations

import argparse
import json
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import PYTHON, REPO, VAR, Report, machine, verdict, workdir

DEFAULT = ("ingest", "latency", "replay", "charts", "laws")
ALL = (*DEFAULT, "stages", "core", "arl")


def parse() -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument(
        "--only", nargs="+", choices=ALL, default=list(DEFAULT), help="benchmarks to run (default: the five)"
    )
    parser.add_argument("--skip", nargs="+", choices=ALL, default=[], help="benchmarks to leave out")
    parser.add_argument("--quick", action="store_true", help="fewer, shorter runs (to check the machinery)")
    parser.add_argument("--repeats", type=int, default=5, help="pairs per ingest case (default 5)")
    parser.add_argument("--messages", type=int, default=20_000, help="single-reading messages per ingest run")
    parser.add_argument(
        "--batch-messages", type=int, default=3_000, help="100-reading messages per ingest run"
    )
    parser.add_argument(
        "--stores", nargs="+", default=["sqlite", "postgresql"], choices=["sqlite", "postgresql"]
    )
    parser.add_argument(
        "--inflight-variant",
        type=int,
        default=1000,
        help="also measure SQLite single readings with this broker max_inflight_messages (0: skip)",
    )
    parser.add_argument("--probes", type=int, default=1000, help="alerts timed with set_tcp_nodelay true")
    parser.add_argument(
        "--probes-default", type=int, default=200, help="alerts timed with the broker default"
    )
    parser.add_argument(
        "--load-rate", type=float, default=None, help="background readings/s (default: half capacity)"
    )
    parser.add_argument("--replay-rows", type=int, default=10_000_000)
    parser.add_argument("--replay-runs", type=int, default=3)
    parser.add_argument("--replay-points", action="store_true", help="also time replay writing every point")
    parser.add_argument("--charts", type=int, default=10_000, help="charts of the many-charts benchmark")
    parser.add_argument(
        "--chart-rounds", type=int, default=10, help="messages per chart in the many-charts run"
    )
    parser.add_argument(
        "--fixed-charts",
        type=int,
        default=2_000,
        help="fixed (one YAML entry each) charts to try; start-up grows as the square (0: skip)",
    )
    parser.add_argument("--chart-repeats", type=int, default=1)
    parser.add_argument("--core-readings", type=int, default=2_000_000, help="passed to bench_core.py")
    parser.add_argument("--core-runs", type=int, default=3, help="passed to bench_core.py and bench_arl.py")
    parser.add_argument("--keep", action="store_true", help="keep the scratch directory")
    args = parser.parse_args()
    if args.quick:
        args.repeats = 2
        args.messages = 10_000
        args.batch_messages = 300
        args.probes = 200
        args.probes_default = 50
        args.replay_rows = 1_000_000
        args.replay_runs = 1
        args.charts = 2_000
        args.chart_rounds = 5
        args.fixed_charts = 0
        args.core_readings = 1_000_000
        args.core_runs = 1
        args.inflight_variant = 0
    return args


def run_script(report: Report, label: str, command: list[str]) -> None:
    """Run one of the older benchmark scripts and keep its own table verbatim."""
    print(f"== {label}: {' '.join(command)}", flush=True)
    started = time.monotonic()
    done = subprocess.run(command, capture_output=True, text=True, cwd=REPO, check=False, timeout=1800)
    text = (done.stdout + done.stderr).rstrip()
    print(text, flush=True)
    report.raw[label] = text
    report.note(f"{label} took {time.monotonic() - started:.0f} s (exit {done.returncode})")


LAW_TARGETS = (
    ("law of the mean", r"cold ([0-9.]+) ms", "new law <= 20 ms", 20.0),
    ("p-value of a beyond-limits mean, law cached", r"^([0-9.]+) us", "<= 20 us", 20.0),
)


def run_laws(report: Report, args: argparse.Namespace) -> None:
    """scripts/bench/laws.py (kept by the law's authors): in-process if it offers ``run``, else as a script.

    The issue's targets are put beside its rows here (the script reports figures only).
    """
    import laws  # noqa: PLC0415

    if not hasattr(laws, "run"):
        run_script(report, "laws", [PYTHON, "scripts/bench/laws.py"])
        return
    before = len(report.rows)
    laws.run(report, args)
    for row in report.rows[before:]:
        for prefix, pattern, target, most in LAW_TARGETS:
            found = re.search(pattern, row.measured)
            if row.case.startswith(prefix) and found and not row.target:
                row.target = target
                row.verdict = verdict(float(found.group(1)), most, higher_is_better=False)


def main() -> None:
    args = parse()
    chosen = [b for b in args.only if b not in args.skip]
    report = Report()
    described = machine()
    print("machine:")
    for key, value in described.items():
        print(f"  {key}: {value}")
    print(flush=True)
    directory = workdir()
    context: dict[str, object] = {}
    began = time.monotonic()
    try:
        for bench in ALL:
            if bench not in chosen:
                continue
            print(f"== {bench}", flush=True)
            started = time.monotonic()
            if bench == "ingest":
                import ingest  # noqa: PLC0415

                ingest.run(
                    report,
                    directory,
                    repeats=args.repeats,
                    messages=args.messages,
                    batch_messages=args.batch_messages,
                    stores=args.stores,
                    context=context,
                    inflight_variant=args.inflight_variant or None,
                )
            elif bench == "latency":
                import latency  # noqa: PLC0415

                latency.run(report, directory, args, context)
            elif bench == "replay":
                import replay_speed  # noqa: PLC0415

                replay_speed.run(report, directory, args)
            elif bench == "charts":
                import many_charts  # noqa: PLC0415

                many_charts.run(report, directory, args)
            elif bench == "stages":
                import stages  # noqa: PLC0415

                stages.run(report, directory, stores=args.stores)
            elif bench == "laws":
                run_laws(report, args)
            elif bench == "core":
                run_script(
                    report,
                    "bench_core",
                    [
                        PYTHON,
                        "scripts/bench_core.py",
                        "--readings",
                        str(args.core_readings),
                        "--runs",
                        str(args.core_runs),
                    ],
                )
            elif bench == "arl":
                run_script(
                    report, "bench_arl", [PYTHON, "scripts/bench_arl.py", "--runs", str(args.core_runs)]
                )
            report.note(f"{bench} took {time.monotonic() - started:.0f} s")
    finally:
        if not args.keep:
            shutil.rmtree(directory, ignore_errors=True)
    finish(report, described, time.monotonic() - began)


def finish(report: Report, described: dict[str, str], seconds: float) -> None:
    print()
    print("machine: " + "; ".join(f"{k}: {v}" for k, v in described.items()))
    print()
    print(report.table())
    print()
    for note in report.notes:
        print(f"- {note}")
    for label, text in report.raw.items():
        print(f"\n{label}:\n{text}")
    print(f"\nwhole run: {seconds / 60:.1f} minutes")
    VAR.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%dT%H%M%S")
    out = VAR / f"results-{stamp}.md"
    body = [
        "# Benchmark run " + stamp,
        "",
        *[f"- {k}: {v}" for k, v in described.items()],
        "",
        report.markdown(),
        "",
    ]
    body += [f"- {note}" for note in report.notes]
    body += [f"\n## {label}\n\n```\n{text}\n```" for label, text in report.raw.items()]
    out.write_text("\n".join(body) + "\n")
    (VAR / f"results-{stamp}.json").write_text(
        json.dumps(
            {"machine": described, "rows": [r.__dict__ for r in report.rows], "notes": report.notes}, indent=1
        )
    )
    print(f"saved {out.relative_to(REPO)}")


if __name__ == "__main__":
    main()
