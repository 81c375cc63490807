"""Benchmark 1: ingest end to end, the daemon against a bare client in the same run.

A publisher (``mosquitto_pub -l``, QoS 1, at full speed) sends N messages to a private Mosquitto.
The consumer is either

* the bare reference (``bare_client.py``: aiomqtt, persistent session, QoS 1, manual ack,
  TCP_NODELAY, counts and acknowledges), or
* the daemon as a process (``python -m monitor run``): one chart, subgroups of 5, X-bar/R +
  EWMA + CUSUM with the Western Electric rules, alerts on, stored in SQLite or PostgreSQL,
  each message acknowledged after its commit.

Rate = readings / (end - publisher start). The bare client's end is the arrival of its last
message; the daemon's end is the start of its last commit carrying readings (the newest chart
checkpoint's ``updated_ms``) plus its mean commit time. Bare and daemon alternate within each
repeat (the first of the pair alternates too), and the ratio is taken pair by pair.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import orjson
from common import (
    BareClient,
    Broker,
    DaemonProcess,
    Report,
    Row,
    Series,
    chart_yaml,
    free_port,
    last_commit_seconds,
    mosquitto_pub,
    process_cpu_seconds,
    process_memory_mib,
    rate_text,
    storage,
    stored_subgroups,
    unique,
    verdict,
    write_config,
)

BATCH = 100
WARM_READINGS = 10  # two subgroups on a second chart before timing: first-use caches (chart constants,
# SQL statements) are filled, as in a daemon that has been running for a while


def warm(port: int, topic: str, directory: Path) -> None:
    path = directory / "warm.jsonl"
    if not path.exists():
        now = time.time()
        lines = [
            orjson.dumps({"v": 8.0 + 0.01 * (k % 3), "ts": now + k, "seq": k + 1})
            for k in range(WARM_READINGS)
        ]
        path.write_bytes(b"\n".join(lines) + b"\n")
    mosquitto_pub(port, topic, path)


@dataclass
class Case:
    store: str  # sqlite | postgresql
    batch: bool  # 100 readings per message (batch: array) or one
    messages: int

    @property
    def readings(self) -> int:
        return self.messages * (BATCH if self.batch else 1)

    @property
    def label(self) -> str:
        store = "SQLite" if self.store == "sqlite" else "PostgreSQL"
        shape = f"{BATCH}-reading JSON batches" if self.batch else "1 reading/msg"
        return f"{store}, {shape}"


@dataclass
class Outcome:
    case: Case
    bare: Series = field(default_factory=Series)
    daemon: Series = field(default_factory=Series)
    ratio: Series = field(default_factory=Series)
    publisher: Series = field(default_factory=Series)
    cpu_us_per_msg: Series = field(default_factory=Series)
    bare_cpu_us_per_msg: Series = field(default_factory=Series)
    msgs_per_commit: Series = field(default_factory=Series)
    commit_ms: Series = field(default_factory=Series)
    commit_share: Series = field(default_factory=Series)
    rss_mib: Series = field(default_factory=Series)
    stored_ok: list[bool] = field(default_factory=list)


def make_lines(path: Path, messages: int, *, batch: bool, seed: int = 7) -> Path:
    """JSON payloads, one per line: in-control normal readings (mean 8, sd 0.04), 1 ms apart."""
    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    per = BATCH if batch else 1
    values = np.round(rng.normal(8.0, 0.04, size=messages * per), 4).tolist()
    start = round(time.time(), 3)
    with path.open("wb") as out:
        for m in range(messages):
            items = [
                {
                    "v": values[m * per + j],
                    "ts": round(start + (m * per + j) * 0.001, 3),
                    "seq": m * per + j + 1,
                }
                for j in range(per)
            ]
            out.write(orjson.dumps(items if batch else items[0]))
            out.write(b"\n")
    return path


def one_bare(broker: Broker, case: Case, lines: Path, outcome: Outcome) -> float:
    topic = f"bench/{unique('bare')}/in"
    client = BareClient(broker.port, topic, case.messages)
    started, published = mosquitto_pub(broker.port, topic, lines)
    result = client.result(timeout=max(120.0, case.messages / 200))
    rate = case.readings / (result["last"] - started)
    outcome.bare.add(rate)
    outcome.bare_cpu_us_per_msg.add(result["cpu"] / case.messages * 1e6)
    outcome.publisher.add(case.readings / (published - started))
    return rate


def one_daemon(
    broker: Broker, case: Case, lines: Path, directory: Path, outcome: Outcome, keep: dict
) -> float:
    name = unique("ing")
    topic = f"bench/{name}/in"
    warm_topic = f"bench/{name}/warm"
    with storage(case.store, directory) as url:
        health = free_port()
        config = write_config(
            directory / f"{name}.yaml",
            port=broker.port,
            client_id=f"monitor-{name}",
            prefix=f"bench/{name}/monitor",
            charts=chart_yaml("press/thickness", topic, batch=case.batch) + chart_yaml("warm/up", warm_topic),
            url=url,
            health_port=health,
        )
        daemon = DaemonProcess(config, directory / f"{name}.log", health).start()
        try:
            warm(broker.port, warm_topic, directory)
            daemon.wait_readings(WARM_READINGS, timeout=60.0)
            if keep.get("on_start"):
                keep["on_start"](daemon)
            cpu_before = process_cpu_seconds(daemon.pid)
            before = daemon.metrics()
            started, _ = mosquitto_pub(broker.port, topic, lines)
            # polled slowly: the end time comes from the store, and each scrape costs the daemon CPU
            after = daemon.wait_readings(
                case.readings + WARM_READINGS, timeout=max(120.0, case.readings / 300), interval=0.25
            )
            cpu = process_cpu_seconds(daemon.pid) - cpu_before
            rss, _ = process_memory_mib(daemon.pid)
            if keep.get("on_done"):
                keep["on_done"](daemon)
        finally:
            daemon.stop()
        commits = after["line_monitor_database_commit_seconds_count"] - before.get(
            "line_monitor_database_commit_seconds_count", 0.0
        )
        commit_s = after["line_monitor_database_commit_seconds_sum"] - before.get(
            "line_monitor_database_commit_seconds_sum", 0.0
        )
        last = last_commit_seconds(url, "press/thickness")
        if last is None:
            msg = "no checkpoint stored"
            raise RuntimeError(msg)
        end = last + (commit_s / commits if commits else 0.0)
        stored = stored_subgroups(url)
    rate = case.readings / (end - started)
    outcome.daemon.add(rate)
    outcome.cpu_us_per_msg.add(cpu / case.messages * 1e6)
    outcome.msgs_per_commit.add(case.messages / commits if commits else float("nan"))
    outcome.commit_ms.add(commit_s / commits * 1e3 if commits else float("nan"))
    outcome.commit_share.add(commit_s / (end - started))
    outcome.rss_mib.add(rss)
    outcome.stored_ok.append(stored == (case.readings + WARM_READINGS) // 5)
    return rate


def measure(
    broker: Broker, case: Case, repeats: int, directory: Path, lines: Path, hooks: dict | None = None
) -> Outcome:
    outcome = Outcome(case)
    bare_rates: list[float] = []
    daemon_rates: list[float] = []
    for i in range(repeats):
        order = ("bare", "daemon") if i % 2 == 0 else ("daemon", "bare")
        for kind in order:
            if kind == "bare":
                bare_rates.append(one_bare(broker, case, lines, outcome))
            else:
                daemon_rates.append(one_daemon(broker, case, lines, directory, outcome, hooks or {}))
        outcome.ratio.add(daemon_rates[-1] / bare_rates[-1])
        print(
            f"    {case.label} run {i + 1}/{repeats}: bare {rate_text(bare_rates[-1])} readings, "
            f"daemon {rate_text(daemon_rates[-1])} readings, ratio {outcome.ratio.values[-1]:.2f}",
            flush=True,
        )
    return outcome


def report_outcome(report: Report, outcome: Outcome, target: float, *, prefix: str = "1 ingest") -> None:
    o = outcome
    report.add(
        Row(
            prefix,
            f"{o.case.label} (daemon process)",
            f"{rate_text(o.daemon.median)} readings ({o.daemon.spread()})",
            f"bare {rate_text(o.bare.median)} ({o.bare.spread()})",
            f"{o.ratio.median:.2f} ({o.ratio.low:.2f}-{o.ratio.high:.2f})",
            f">= {target} x bare",
            verdict(o.ratio.median, target),
        )
    )
    report.note(
        f"ingest {o.case.label}: {len(o.daemon.values)} pairs of {o.case.messages} messages; "
        f"publisher alone {rate_text(o.publisher.median)} readings; CPU per message: daemon "
        f"{o.cpu_us_per_msg.median:.0f} us, bare {o.bare_cpu_us_per_msg.median:.0f} us; "
        f"{o.msgs_per_commit.median:.1f} messages/commit, "
        f"{o.commit_ms.median:.2f} ms/commit, commits {100 * o.commit_share.median:.0f}% of wall time, "
        f"RSS {o.rss_mib.median:.0f} MiB, every subgroup stored: {all(o.stored_ok)}"
    )


def run(
    report: Report,
    directory: Path,
    *,
    repeats: int,
    messages: int,
    batch_messages: int,
    stores: list[str],
    context: dict,
    inflight_variant: int | None = None,
) -> None:
    targets = {"sqlite": 0.6, "postgresql": 0.5}
    single = make_lines(directory / f"single-{messages}.jsonl", messages, batch=False)
    batched = make_lines(directory / f"batch-{batch_messages}.jsonl", batch_messages, batch=True)
    with Broker(directory, nodelay=True) as broker:
        report.note(f"ingest broker: {broker.describe()}")
        for store in stores:
            for batch in (False, True):
                case = Case(store, batch, batch_messages if batch else messages)
                outcome = measure(broker, case, repeats, directory, batched if batch else single)
                report_outcome(report, outcome, targets[store])
                context[f"ingest/{store}/{'batch' if batch else 'single'}"] = outcome
    if inflight_variant:
        with Broker(directory, nodelay=True, inflight=inflight_variant) as broker:
            case = Case("sqlite", batch=False, messages=messages)
            outcome = measure(broker, case, max(1, repeats - 2), directory, single)
            report_outcome(
                report, outcome, targets["sqlite"], prefix=f"1 ingest, inflight {inflight_variant}"
            )
            context["ingest/sqlite/single/inflight"] = outcome
