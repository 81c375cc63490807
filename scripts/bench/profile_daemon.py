"""Where the daemon's time goes under the ingest benchmark: py-spy samples, grouped per activity.

Runs the ingest scenario of ``ingest.py`` (a daemon process, one chart, subgroups of 5, X-bar/R +
EWMA + CUSUM, Western Electric rules, SQLite or PostgreSQL) with ``py-spy record`` attached
(raw collapsed stacks, on-CPU samples only, every thread), then sorts each sample into one
activity by the frames on its stack (see CATEGORIES) and prints the share of each, and the CPU
microseconds per message it stands for (the daemon's CPU time from /proc over the run).

    .venv/bin/python scripts/bench/profile_daemon.py --store sqlite --shape single
    .venv/bin/python scripts/bench/profile_daemon.py --summarise var/bench/profile-sqlite-single.txt

py-spy must be in the venv (``.venv/bin/pip install py-spy``); it needs ptrace rights (root here).
"""

from __future__ import annotations

import argparse
import re
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import ingest
import many_charts
from common import VAR, Broker, process_cpu_seconds, workdir

F = r"^(?:[\w<>]+\.)*"  # a frame's function, after its class or enclosing function: "Daemon.handle"
# (tag, pattern on one frame "function (path:line)", sticky). Frames are scanned from the root
# to the leaf; the deepest matching tag wins, except that a sticky tag, once met, keeps the
# sample (so the paho call under an acknowledgement counts as 'acks', not as 'MQTT client').
CATEGORIES: list[tuple[str, str, bool]] = [
    ("event loop (asyncio)", r"\(.*asyncio/", False),
    ("MQTT client (paho/aiomqtt receive, send)", r"\(.*(paho/|aiomqtt/)", False),
    ("MQTT link (monitor/mqtt.py)", r"\(.*monitor/mqtt\.py", False),
    ("daemon loop, other", r"\(.*monitor/daemon\.py", False),
    ("handle: other (stats, sequence, timestamps)", F + r"handle \(.*monitor/daemon\.py", False),
    (
        "decode (orjson + mapping)",
        F
        + r"(decode|_parse_json|_loads|_mapped|_array|_lookup|_number|_time|_sequence|_iso_seconds|_nesting"
        + r"|decode_columns|_raw_columns|_fast_columns|_plain_floats)"
        + r" \(.*monitor/ingest\.py",
        False,
    ),
    ("routing (Router.resolve)", F + r"(resolve|_routing|_expand) \(.*monitor/ingest\.py", False),
    ("subgroup forming", r"\(.*monitor/spc/subgroups\.py", False),
    (
        "charts (X-bar/R, EWMA, CUSUM)",
        r"\(.*monitor/spc/(charts/|chartset\.py|constants\.py|limits\.py)",
        False,
    ),
    ("run rules", r"\(.*monitor/spc/rules\.py", False),
    ("p-values", F + r"(_context|p_value) \(.*monitor/(daemon|spc/pvalues)\.py", True),
    ("alert tracker + CloudEvents", r"\(.*monitor/alerts\.py", True),
    (
        "subgroup/signal rows (points dicts)",
        F + r"(_chart|_signalled|_batch_rows) \(.*monitor/daemon\.py",
        False,
    ),
    ("checkpoint state (to_state, guard)", F + r"(to_state|checkpoint|remember) \(.*monitor/", True),
    (
        "storage (SQLAlchemy, driver, store.py)",
        r"\(.*(sqlalchemy/|aiosqlite/|psycopg/|sqlite3/|monitor/store/)",
        False,
    ),
    ("storage: JSON encoding of rows", r"\((.*/)?json/(encoder|__init__)\.py", True),
    ("acks (link.ack)", F + r"ack \(.*monitor/mqtt\.py", True),
    (
        "alert outbox (publish loop, its DB reads)",
        F + r"(_publish_loop|publish_pending) \(.*monitor/daemon\.py",
        True,
    ),
    ("logging (structlog)", r"\(.*structlog/", True),
    ("metrics (prometheus_client)", r"\(.*(prometheus_client/|monitor/health\.py)", True),
    ("health endpoint threads (the benchmark's /metrics polls)", r"\(.*(socketserver|http/server)\.py", True),
]
COMPILED = [(tag, re.compile(pattern), sticky) for tag, pattern, sticky in CATEGORIES]


def categorise(frames: list[str]) -> str:
    found = "other"
    sticky_found = False
    for frame in frames:
        if sticky_found:
            break
        for tag, pattern, sticky in COMPILED:
            if pattern.search(frame):
                found = tag
                sticky_found = sticky
                # keep scanning the table: later (more specific) patterns may also match
    return found


def read_raw(path: Path) -> list[tuple[list[str], int]]:
    samples = []
    for line in path.read_text().splitlines():
        stack, _, count = line.rpartition(" ")
        if not stack or not count.isdigit():
            continue
        samples.append((stack.split(";"), int(count)))
    return samples


def summarise(path: Path, cpu_us_per_message: float | None = None, top: int = 25) -> str:
    samples = read_raw(path)
    total = sum(c for _, c in samples)
    by_category: Counter[str] = Counter()
    by_thread: Counter[str] = Counter()
    by_leaf: Counter[str] = Counter()
    for frames, count in samples:
        thread = frames[0] if frames and frames[0].startswith(("thread", "process")) else "?"
        by_thread[re.sub(r"\(0x[0-9a-f]+\)", "", thread).strip()] += count
        body = [f for f in frames if not f.startswith(("thread", "process"))]
        by_category[categorise(body)] += count
        if body:
            by_leaf[re.sub(r":\d+\)$", ")", body[-1])] += count
    lines = [f"{path.name}: {total} on-CPU samples"]
    lines.append(f"{'activity':48s} {'share':>6s}" + ("  us/message" if cpu_us_per_message else ""))
    for tag, count in by_category.most_common():
        share = count / total
        extra = f"  {share * cpu_us_per_message:9.1f}" if cpu_us_per_message else ""
        lines.append(f"{tag:48s} {100 * share:5.1f}%{extra}")
    lines.append("\nthreads:")
    lines += [f"  {100 * c / total:5.1f}%  {name}" for name, c in by_thread.most_common(6)]
    lines.append(f"\nleaf frames (self time), top {top}:")
    lines += [f"  {100 * c / total:5.1f}%  {name}" for name, c in by_leaf.most_common(top)]
    return "\n".join(lines)


def record(
    store: str, shape: str, messages: int, rate: int, out: Path, charts: int = 0
) -> tuple[float, float]:
    """Run the ingest scenario (or, with ``charts``, the many-charts one) once under py-spy.

    Returns the daemon's CPU microseconds per message and the readings/s reached under the profiler.
    """
    spy = shutil.which("py-spy", path=str(Path(sys.executable).parent)) or shutil.which("py-spy")
    if spy is None:
        msg = "py-spy is not installed: .venv/bin/pip install py-spy"
        raise SystemExit(msg)
    directory = workdir()
    batch = shape == "batch"
    case = ingest.Case(store, batch, messages)
    lines = ingest.make_lines(directory / f"{shape}-{messages}.jsonl", messages, batch=batch)
    state: dict[str, object] = {}

    def on_start(daemon: object) -> None:
        pid = daemon.pid  # type: ignore[attr-defined]
        state["spy"] = subprocess.Popen(
            [
                spy,
                "record",
                "--pid",
                str(pid),
                "--rate",
                str(rate),
                "--format",
                "raw",
                "--threads",
                "--nonblocking",
                "--output",
                str(out),
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        time.sleep(1.0)  # py-spy attaches
        state["cpu"] = process_cpu_seconds(pid)

    def on_done(daemon: object) -> None:
        pid = daemon.pid  # type: ignore[attr-defined]
        state["cpu"] = process_cpu_seconds(pid) - float(state["cpu"])  # type: ignore[arg-type]
        spy_process = state["spy"]
        spy_process.send_signal(signal.SIGINT)  # type: ignore[attr-defined]
        spy_process.wait(timeout=60)  # type: ignore[attr-defined]

    hooks = {"on_start": on_start, "on_done": on_done}
    with Broker(directory) as broker:
        if charts:
            figures = many_charts.one(
                broker, directory, charts=charts, mode="template", messages=messages, hooks=hooks
            )
            reached = figures["rate"]
        else:
            reached = ingest.measure(broker, case, 1, directory, lines, hooks=hooks).daemon.median
    shutil.rmtree(directory, ignore_errors=True)
    cpu_us = float(state["cpu"]) / messages * 1e6  # type: ignore[arg-type]
    return cpu_us, reached


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--store", choices=["sqlite", "postgresql"], default="sqlite")
    parser.add_argument("--shape", choices=["single", "batch"], default="single")
    parser.add_argument(
        "--messages", type=int, default=None, help="default 30000 single or 6000 batch messages"
    )
    parser.add_argument("--rate", type=int, default=250, help="samples per second")
    parser.add_argument("--charts", type=int, default=0, help="many-charts scenario with this many charts")
    parser.add_argument("--summarise", type=Path, help="only summarise an existing raw profile")
    args = parser.parse_args()
    if args.summarise:
        print(summarise(args.summarise))
        return
    messages = args.messages or (30_000 if args.shape == "single" else 6000)
    VAR.mkdir(parents=True, exist_ok=True)
    name = f"charts{args.charts}" if args.charts else f"{args.store}-{args.shape}"
    out = VAR / f"profile-{name}.txt"
    cpu_us, rate = record(args.store, args.shape, messages, args.rate, out, charts=args.charts)
    print(
        f"{name}: {messages} messages, {rate:.0f} readings/s under the profiler, "
        f"daemon CPU {cpu_us:.0f} us/message"
    )
    print(summarise(out, cpu_us))


if __name__ == "__main__":
    main()
