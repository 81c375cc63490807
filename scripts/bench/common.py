"""Shared pieces of the benchmarks: private services, the daemon as a process, timing and tables.

Everything runs on loopback: a Mosquitto of our own on a free port (with or without
``set_tcp_nodelay``), the PostgreSQL on 127.0.0.1:5432 (a database of our own, dropped after),
SQLite files under a temporary directory. Nothing here asserts on speed.
"""

from __future__ import annotations

import contextlib
import json
import os
import platform
import shutil
import signal
import socket
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
import uuid
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Self

REPO = Path(__file__).resolve().parents[2]
HERE = Path(__file__).resolve().parent
VAR = REPO / "var" / "bench"
PYTHON = sys.executable
PG_ADMIN = "postgresql://postgres@127.0.0.1:5432/postgres"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on now."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def unique(prefix: str) -> str:
    """A short unique name for topics, prefixes, client ids and databases."""
    return f"{prefix}{uuid.uuid4().hex[:8]}"


def workdir() -> Path:
    """A scratch directory for one benchmark run (removed by the caller)."""
    return Path(tempfile.mkdtemp(prefix="monitor-bench-"))


# ---------------------------------------------------------------- statistics and tables


@dataclass
class Series:
    """Repeated measurements of one quantity."""

    values: list[float] = field(default_factory=list)

    def add(self, value: float) -> None:
        self.values.append(value)

    @property
    def median(self) -> float:
        return statistics.median(self.values) if self.values else float("nan")

    @property
    def low(self) -> float:
        return min(self.values) if self.values else float("nan")

    @property
    def high(self) -> float:
        return max(self.values) if self.values else float("nan")

    def spread(self) -> str:
        """Run-to-run spread as +-% of the median (half the min-max range), or '1 run'."""
        if len(self.values) < 2:
            return "1 run"
        half = (self.high - self.low) / 2
        return f"+-{100 * half / self.median:.0f}%" if self.median else "n/a"


def rate_text(value: float, unit: str = "/s") -> str:
    """12.3 k/s, 1.25 M/s."""
    if value != value:  # NaN  # noqa: PLR0124
        return "n/a"
    if value >= 1e6:
        return f"{value / 1e6:.2f} M{unit}"
    if value >= 1e3:
        return f"{value / 1e3:.1f} k{unit}"
    return f"{value:.0f}{unit}"


@dataclass
class Row:
    """One line of the final table."""

    bench: str
    case: str
    measured: str
    reference: str
    ratio: str
    target: str
    verdict: str
    runs: str = ""


class Report:
    """Rows of all benchmarks, printed as one table at the end (and saved as JSON and Markdown)."""

    def __init__(self) -> None:
        self.rows: list[Row] = []
        self.notes: list[str] = []
        self.raw: dict[str, object] = {}

    def add(self, row: Row) -> None:
        self.rows.append(row)
        print(
            f"  -> {row.bench} | {row.case} | {row.measured} | ref {row.reference} | {row.ratio}", flush=True
        )

    def note(self, text: str) -> None:
        self.notes.append(text)

    def table(self) -> str:
        head = (
            "benchmark",
            "case",
            "measured (median, spread)",
            "reference, same run",
            "ratio",
            "target",
            "",
        )
        body = [(r.bench, r.case, r.measured, r.reference, r.ratio, r.target, r.verdict) for r in self.rows]
        widths = [max(len(str(x[i])) for x in [head, *body]) for i in range(len(head))]
        lines = [" | ".join(str(c).ljust(w) for c, w in zip(head, widths, strict=True))]
        lines.append("-+-".join("-" * w for w in widths))
        lines += [" | ".join(str(c).ljust(w) for c, w in zip(row, widths, strict=True)) for row in body]
        return "\n".join(lines)

    def markdown(self) -> str:
        head = "| benchmark | case | measured (median, spread) | reference, same run | ratio | target | |"
        lines = [head, "|---|---|---|---|---|---|---|"]
        lines += [
            f"| {r.bench} | {r.case} | {r.measured} | {r.reference} | {r.ratio} | {r.target} | {r.verdict} |"
            for r in self.rows
        ]
        return "\n".join(lines)


def verdict(value: float, target: float, *, higher_is_better: bool = True) -> str:
    if value != value:  # noqa: PLR0124
        return "?"
    ok = value >= target if higher_is_better else value <= target
    return "meets" if ok else "BELOW" if higher_is_better else "ABOVE"


# ---------------------------------------------------------------- the machine


def _first_line(command: Sequence[str]) -> str:
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=10, check=False)
    except (OSError, subprocess.TimeoutExpired):
        return "?"
    text = (done.stdout or done.stderr).strip().splitlines()
    return text[0] if text else "?"


def _lines(command: Sequence[str]) -> list[str]:
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=10, check=False)
    except (OSError, subprocess.TimeoutExpired):
        return []
    return [line for line in done.stdout.splitlines() if line.strip()]


def machine() -> dict[str, str]:
    """What the figures were measured on."""
    cpu = "?"
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    memory = "?"
    with contextlib.suppress(OSError):
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                memory = f"{int(line.split()[1]) / 1024 / 1024:.1f} GiB"
                break
    virt = "?"
    with contextlib.suppress(OSError):
        for line in subprocess.run(
            ["lscpu"], capture_output=True, text=True, check=False
        ).stdout.splitlines():
            if line.startswith("Hypervisor vendor"):
                virt = line.split(":", 1)[1].strip() + " guest"
    import numpy as np  # noqa: PLC0415 - only to name its version

    mosquitto = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    return {
        "cpu": f"{cpu}, {os.cpu_count()} logical CPUs ({platform.machine()}, virtualisation: {virt})",
        "memory": memory,
        "kernel": platform.release(),
        "python": f"{platform.python_implementation()} {platform.python_version()}",
        "numpy": np.__version__,
        "sqlite": sqlite3.sqlite_version,
        "mosquitto": _first_line([mosquitto, "-h"]),
        "postgresql": _first_line(
            ["psql", "-At", "-h", "127.0.0.1", "-U", "postgres", "-c", "show server_version"]
        ),
        "postgresql settings": _first_line(
            [
                "psql",
                "-At",
                "-h",
                "127.0.0.1",
                "-U",
                "postgres",
                "-c",
                (
                    "select 'fsync=' || current_setting('fsync') "
                    "|| ', synchronous_commit=' || current_setting('synchronous_commit')"
                ),
            ]
        ),
        "code": _first_line(["git", "-C", str(REPO), "describe", "--always", "--dirty"])
        + f" ({len(_lines(['git', '-C', str(REPO), 'status', '--short', 'monitor']))} changed or new paths"
        " under monitor/)",
        "load average at start": " ".join(f"{x:.2f}" for x in os.getloadavg()),
    }


# ---------------------------------------------------------------- broker


class Broker:
    """A Mosquitto of our own on a free loopback port (the settings the README asks for).

    ``nodelay=False`` leaves ``set_tcp_nodelay`` at Mosquitto's default (false), for comparison.
    """

    def __init__(self, directory: Path, *, nodelay: bool = True, inflight: int = 100) -> None:
        self.port = free_port()
        self.nodelay = nodelay
        self.inflight = inflight
        self.conf = directory / f"mosquitto-{self.port}.conf"
        keep_user = "user root\n" if os.geteuid() == 0 else ""
        text = (
            f"listener {self.port} 127.0.0.1\n{keep_user}allow_anonymous true\npersistence false\n"
            f"max_queued_messages 1000000\nmax_inflight_messages {inflight}\n"
        )
        if nodelay:
            text += "set_tcp_nodelay true\n"
        self.conf.write_text(text)
        self.process: subprocess.Popen[bytes] | None = None

    def describe(self) -> str:
        nodelay = "set_tcp_nodelay true" if self.nodelay else "set_tcp_nodelay default (false)"
        return f"Mosquitto :{self.port}, {nodelay}, max_inflight_messages {self.inflight}"

    def start(self) -> Broker:
        binary = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        self.process = subprocess.Popen(
            [binary, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            with (
                contextlib.suppress(OSError),
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5),
            ):
                return self
            time.sleep(0.05)
        msg = f"private Mosquitto did not start on port {self.port}"
        raise RuntimeError(msg)

    def stop(self) -> None:
        if self.process is not None:
            self.process.terminate()
            self.process.wait(timeout=10)
            self.process = None

    def __enter__(self) -> Self:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


# ---------------------------------------------------------------- PostgreSQL


class PostgresDatabase:
    """A database of our own on the PostgreSQL at 127.0.0.1:5432, dropped by :meth:`drop`."""

    def __init__(self) -> None:
        import psycopg  # noqa: PLC0415 - only PostgreSQL runs need it

        self.name = unique("monitor_bench_")
        with psycopg.connect(PG_ADMIN, autocommit=True) as admin:
            admin.execute(f'CREATE DATABASE "{self.name}"')
        self.url = f"postgresql://postgres@127.0.0.1:5432/{self.name}"

    def drop(self) -> None:
        import psycopg  # noqa: PLC0415

        with psycopg.connect(PG_ADMIN, autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{self.name}" WITH (FORCE)')


@contextlib.contextmanager
def storage(kind: str, directory: Path) -> Iterator[str]:
    """A fresh store URL: ``sqlite`` (a file in ``directory``) or ``postgresql`` (a fresh database)."""
    if kind == "sqlite":
        path = directory / f"{unique('store-')}.db"
        yield f"sqlite:///{path}"
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        return
    database = PostgresDatabase()
    try:
        yield database.url
    finally:
        database.drop()


def last_commit_seconds(url: str, like: str = "%") -> float | None:
    """When the last commit that carried readings began (the newest chart checkpoint), epoch seconds."""
    query = "select max(updated_ms) from checkpoints where chart not like ? and chart like ?"
    if url.startswith("sqlite:///"):
        path = url.removeprefix("sqlite:///")
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10) as db:
            row = db.execute(query, ("@%", like)).fetchone()
    else:
        import psycopg  # noqa: PLC0415

        with psycopg.connect(url) as db:
            row = db.execute(query.replace("?", "%s"), ("@%", like)).fetchone()
    return None if row is None or row[0] is None else row[0] / 1000.0


def stored_subgroups(url: str) -> int:
    query = "select count(*) from subgroups"
    if url.startswith("sqlite:///"):
        path = url.removeprefix("sqlite:///")
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10) as db:
            return int(db.execute(query).fetchone()[0])
    import psycopg  # noqa: PLC0415

    with psycopg.connect(url) as db:
        row = db.execute(query).fetchone()
    return 0 if row is None else int(row[0])


# ---------------------------------------------------------------- the daemon as a process

INGEST_CHART = """\
  - id: {chart_id}
    topic: {topic}
    payload: {{format: json, value: v, timestamp: ts, sequence: seq{batch}}}
    subgroup: {{size: 5}}
    kinds: [xbar_r, ewma, cusum]
    limits: {{mean: 8.0, sigma: 0.04}}
    rules: western-electric
"""


def chart_yaml(chart_id: str, topic: str, *, batch: bool = False) -> str:
    """One chart as the ingest benchmarks use it: subgroups of 5, X-bar/R + EWMA + CUSUM, WE rules."""
    return INGEST_CHART.format(chart_id=chart_id, topic=topic, batch=", batch: array" if batch else "")


def write_config(
    path: Path,
    *,
    port: int,
    client_id: str,
    prefix: str,
    charts: str,
    url: str,
    health_port: int,
    alerts: str = "",
) -> Path:
    text = (
        f"broker: {{host: 127.0.0.1, port: {port}, client_id: {client_id}, max_buffered_messages: 10000}}\n"
        f"health: {{host: 127.0.0.1, port: {health_port}}}\n"
        f"storage: {{url: {json.dumps(url)}}}\n"
        f"alerts: {{prefix: {prefix}{alerts}}}\n"
        "charts:\n" + charts
    )
    path.write_text(text)
    return path


def scrape(port: int, timeout: float = 5.0) -> dict[str, float]:
    """The daemon's Prometheus metrics without labels (name -> value); labelled series are summed."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=timeout) as answer:
        text = answer.read().decode()
    out: dict[str, float] = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        name, _, value = line.rpartition(" ")
        base = name.split("{", 1)[0]
        with contextlib.suppress(ValueError):
            out[base] = out.get(base, 0.0) + float(value)
    return out


def process_cpu_seconds(pid: int) -> float:
    """User + system CPU seconds a process has used so far (from /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    return (int(fields[11]) + int(fields[12])) / ticks


def process_memory_mib(pid: int) -> tuple[float, float]:
    """Resident memory now and its peak (VmRSS, VmHWM), MiB."""
    now = peak = 0.0
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            now = int(line.split()[1]) / 1024
        elif line.startswith("VmHWM:"):
            peak = int(line.split()[1]) / 1024
    return now, peak


class DaemonProcess:
    """``python -m monitor run`` as operators run it (log level info, JSON lines to a file)."""

    def __init__(self, config: Path, log: Path, health_port: int) -> None:
        self.config = config
        self.log = log
        self.health_port = health_port
        self.process: subprocess.Popen[bytes] | None = None
        self.started_in = 0.0

    @property
    def pid(self) -> int:
        if self.process is None:
            msg = "daemon not running"
            raise RuntimeError(msg)
        return self.process.pid

    def start(self, timeout: float = 600.0) -> DaemonProcess:
        began = time.monotonic()
        with self.log.open("ab") as log:
            self.process = subprocess.Popen(
                [PYTHON, "-m", "monitor", "run", "--config", str(self.config), "--log-level", "info"],
                stdout=log,
                stderr=log,
                cwd=REPO,
            )
        deadline = began + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                msg = f"daemon exited early:\n{self.log.read_text()[-3000:]}"
                raise RuntimeError(msg)
            if b'"mqtt_connected"' in self.log.read_bytes():
                self.started_in = time.monotonic() - began
                return self
            time.sleep(0.05)
        msg = f"daemon did not connect within {timeout} s:\n{self.log.read_text()[-3000:]}"
        raise RuntimeError(msg)

    def metrics(self) -> dict[str, float]:
        return scrape(self.health_port)

    def wait_readings(self, count: int, timeout: float, interval: float = 0.05) -> dict[str, float]:
        """Poll /metrics until ``count`` readings are in; the last scrape."""
        deadline = time.monotonic() + timeout
        seen: dict[str, float] = {}
        while time.monotonic() < deadline:
            seen = self.metrics()
            if seen.get("line_monitor_readings_total", 0.0) >= count:
                return seen
            if self.process is not None and self.process.poll() is not None:
                msg = f"daemon exited:\n{self.log.read_text()[-3000:]}"
                raise RuntimeError(msg)
            time.sleep(interval)
        msg = f"only {seen.get('line_monitor_readings_total')} of {count} readings within {timeout} s"
        raise TimeoutError(msg)

    def stop(self, timeout: float = 120.0) -> int:
        if self.process is None:
            return 0
        self.process.send_signal(signal.SIGTERM)
        try:
            code = self.process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.process.kill()
            code = self.process.wait(timeout=10)
        self.process = None
        return code


# ---------------------------------------------------------------- clients


class BareClient:
    """The reference: an aiomqtt client that only counts (manual ack, TCP_NODELAY), as a process."""

    def __init__(self, port: int, topic: str, count: int) -> None:
        self.process = subprocess.Popen(
            [PYTHON, str(HERE / "bare_client.py"), str(port), topic, str(count), unique("bare-")],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        assert self.process.stdout is not None  # noqa: S101
        line = self.process.stdout.readline().strip()
        if line != "ready":
            err = self.process.stderr.read() if self.process.stderr else ""
            msg = f"bare client did not start: {line} {err}"
            raise RuntimeError(msg)

    def result(self, timeout: float) -> dict[str, float]:
        out, err = self.process.communicate(timeout=timeout)
        try:
            return dict(json.loads(out.strip().splitlines()[-1]))
        except (ValueError, IndexError):
            msg = f"bare client failed: {out} {err}"
            raise RuntimeError(msg) from None


def mosquitto_pub(port: int, topic: str, lines: Path, *, qos: int = 1) -> tuple[float, float]:
    """Publish each line of a file as one message at full speed (mosquitto_pub -l); wall start, end."""
    started = time.time()
    with lines.open("rb") as source:
        subprocess.run(
            ["mosquitto_pub", "-h", "127.0.0.1", "-p", str(port), "-t", topic, "-q", str(qos), "-l"],
            stdin=source,
            check=True,
            timeout=600,
        )
    return started, time.time()


def interleaved(
    repeats: int, work: Callable[[int, str], None], kinds: Sequence[str] = ("bare", "daemon")
) -> None:
    """Run ``work(i, kind)`` for each repeat, alternating which kind goes first (drift hits both alike)."""
    for i in range(repeats):
        order = list(kinds) if i % 2 == 0 else list(reversed(kinds))
        for kind in order:
            work(i, kind)
