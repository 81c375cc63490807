"""Benchmark 2: alert latency under a steady background load.

The daemon (a process, SQLite) keeps two charts: the load chart (subgroups of 5, X-bar/R + EWMA
+ CUSUM, Western Electric rules) fed at a steady rate by ``steady_load.py | mosquitto_pub -l``,
and a probe chart (subgroups of 5, X-bar/R, Western Electric rules, ``clear_after: 1``). Each
probe publishes five readings at the center (a quiet subgroup that clears the previous alert),
four more, waits 5-15 ms, then times the fifth reading, far above, which completes an
out-of-control subgroup: from just before its publish to the arrival of the ``raised`` alert
at a subscriber. Probe publisher and subscriber are aiomqtt clients with TCP_NODELAY, in this
process, on one clock. Storage commit, acknowledgement and the outbox round trip are included.

The probe chart is X-bar/R only because the EWMA and CUSUM of a chart hit by a far-out subgroup
stay out for many subgroups, and a chart that stays out repeats (at most hourly) instead of
raising; the load chart runs the full set.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import random
import socket
import sqlite3
import statistics
import subprocess
import time
from datetime import datetime
from pathlib import Path

import aiomqtt
import ingest
from common import (
    PYTHON,
    Broker,
    DaemonProcess,
    Report,
    Row,
    chart_yaml,
    free_port,
    rate_text,
    storage,
    unique,
    write_config,
)

HERE = Path(__file__).resolve().parent
NODELAY = ((socket.IPPROTO_TCP, socket.TCP_NODELAY, 1),)
PROBE_CHART = """\
  - id: {chart_id}
    topic: {topic}
    payload: {{format: json, value: v, timestamp: ts, sequence: seq}}
    subgroup: {{size: 5}}
    kinds: [xbar_r]
    limits: {{mean: 8.0, sigma: 0.04}}
    rules: western-electric
"""


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    k = (len(ordered) - 1) * q
    low = int(k)
    high = min(low + 1, len(ordered) - 1)
    return ordered[low] + (ordered[high] - ordered[low]) * (k - low)


async def probe(
    port: int, topic: str, alert_topic: str, probes: int, warmup: int = 20
) -> tuple[list[float], int, list[tuple[float, float, str]]]:
    """Latencies (seconds) of ``probes`` alerts after ``warmup`` untimed ones, how many never came,
    and per timed alert (wall-clock publish, wall-clock arrival, alert id) for the breakdown."""
    rng = random.Random(11)
    sub = aiomqtt.Client("127.0.0.1", port, identifier=unique("probe-sub-"), socket_options=NODELAY)
    pub = aiomqtt.Client("127.0.0.1", port, identifier=unique("probe-pub-"), socket_options=NODELAY)
    latencies: list[float] = []
    stamps: list[tuple[float, float, str]] = []
    lost = 0
    async with sub, pub:
        await sub.subscribe(alert_topic, qos=1)
        arrivals: asyncio.Queue[tuple[float, float, bytes]] = asyncio.Queue()

        async def read() -> None:
            async for message in sub.messages:
                arrivals.put_nowait((time.perf_counter(), time.time(), bytes(message.payload)))

        reader = asyncio.create_task(read())
        sequence = 0

        async def send(value: float) -> None:
            nonlocal sequence
            sequence += 1
            body = json.dumps({"v": value, "ts": round(time.time(), 3), "seq": sequence})
            await pub.publish(topic, body, qos=1)

        for i in range(warmup + probes):
            for _ in range(9):
                await send(8.0)
            await asyncio.sleep(rng.uniform(0.005, 0.015))
            while not arrivals.empty():  # the 'cleared' event of the previous probe
                arrivals.get_nowait()
            started, started_wall = time.perf_counter(), time.time()
            publishing = asyncio.create_task(send(8.5))
            arrived = None
            event: dict = {}
            deadline = started + 10.0
            while arrived is None:
                try:
                    at, at_wall, payload = await asyncio.wait_for(
                        arrivals.get(), timeout=max(0.001, deadline - time.perf_counter())
                    )
                except TimeoutError:
                    break
                event = json.loads(payload)
                if event.get("type", "").endswith(".raised"):
                    arrived = at
            await publishing
            if arrived is None:
                lost += 1
            elif i >= warmup:
                latencies.append(arrived - started)
                stamps.append((started_wall, at_wall, str(event.get("id"))))
        reader.cancel()
    return latencies, lost, stamps


def breakdown(url: str, log: Path, stamps: list[tuple[float, float, str]]) -> dict[str, tuple[float, float]]:
    """Median and p99 (ms) of each leg of an alert's way.

    publish -> charted in ``handle`` (the alert's ``created_ms``) -> committed (the
    ``alert_raised`` log line, written after the commit and the acks) -> published by the outbox
    (``sent_ms``, after the broker's acknowledgement) -> arrival. Stored times have 1 ms resolution.
    """
    path = url.removeprefix("sqlite:///")
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10) as db:
        rows = {r[0]: (r[1], r[2]) for r in db.execute("select id, created_ms, sent_ms from alerts")}
    logged: dict[str, float] = {}
    for line in log.read_text(errors="replace").splitlines():
        if '"alert_raised"' not in line:
            continue
        with contextlib.suppress(ValueError, KeyError):
            item = json.loads(line)
            logged[item["alert"]] = datetime.fromisoformat(item["timestamp"]).timestamp()
    legs: dict[str, list[float]] = {
        "to handle": [],
        "handle to committed": [],
        "committed to sent": [],
        "sent to arrival": [],
    }
    for published, arrived, alert in stamps:
        if alert not in rows or alert not in logged or rows[alert][1] is None:
            continue
        created, sent = rows[alert][0] / 1e3, rows[alert][1] / 1e3
        legs["to handle"].append(created - published)
        legs["handle to committed"].append(logged[alert] - created)
        legs["committed to sent"].append(sent - logged[alert])
        legs["sent to arrival"].append(arrived - sent)
    return {k: (1e3 * percentile(v, 0.5), 1e3 * percentile(v, 0.99)) for k, v in legs.items() if v}


def legs_text(result: dict) -> str:
    """The legs of the alerts' way, median/p99 in ms."""
    return "; ".join(f"{k} {m:.1f}/{p:.1f}" for k, (m, p) in result.get("legs", {}).items())


def one_run(broker: Broker, directory: Path, rate: float, probes: int) -> dict[str, float]:
    name = unique("lat")
    load_topic, probe_topic = f"bench/{name}/load", f"bench/{name}/probe"
    prefix = f"bench/{name}/monitor"
    with storage("sqlite", directory) as url:
        health = free_port()
        config = write_config(
            directory / f"{name}.yaml",
            port=broker.port,
            client_id=f"monitor-{name}",
            prefix=prefix,
            charts=chart_yaml("line/load", load_topic)
            + PROBE_CHART.format(chart_id="line/probe", topic=probe_topic),
            url=url,
            health_port=health,
            alerts=", repeat_every: 1h, clear_after: 1",
        )
        daemon = DaemonProcess(config, directory / f"{name}.log", health).start()
        generator = publisher = None
        try:
            if rate > 0:
                generator = subprocess.Popen(
                    [PYTHON, str(HERE / "steady_load.py"), str(rate), "3600"],
                    stdout=subprocess.PIPE,
                    stderr=subprocess.PIPE,
                    text=True,
                )
                publisher = subprocess.Popen(
                    [
                        "mosquitto_pub",
                        "-h",
                        "127.0.0.1",
                        "-p",
                        str(broker.port),
                        "-t",
                        load_topic,
                        "-q",
                        "1",
                        "-l",
                    ],
                    stdin=generator.stdout,
                )
                time.sleep(2.0)  # the load settles
            began = time.monotonic()
            latencies, lost, stamps = asyncio.run(
                probe(broker.port, probe_topic, f"{prefix}/alerts/line/probe", probes)
            )
            seconds = time.monotonic() - began
            sent = 0
            if generator is not None and publisher is not None:
                generator.terminate()
                _, err = generator.communicate(timeout=30)
                sent = int(err.strip().splitlines()[-1])
                publisher.wait(timeout=120)
            before = time.monotonic()
            probe_readings = (probes + 20) * 10
            caught_up = None
            try:
                daemon.wait_readings(sent + probe_readings, timeout=60.0, interval=0.1)
                caught_up = time.monotonic() - before
            except TimeoutError:
                caught_up = None
            processed = daemon.metrics().get("line_monitor_readings_total", 0.0)
        finally:
            for process in (generator, publisher):
                if process is not None and process.poll() is None:
                    process.kill()
            daemon.stop()
        legs = breakdown(url, daemon.log, stamps)
    return {
        "p50": percentile(latencies, 0.5),
        "p99": percentile(latencies, 0.99),
        "max": max(latencies) if latencies else float("nan"),
        "mean": statistics.fmean(latencies) if latencies else float("nan"),
        "count": len(latencies),
        "lost": lost,
        "seconds": seconds,
        "load_sent": sent,
        "load_rate": sent / seconds if seconds else 0.0,
        "backlog_drain_s": -1.0 if caught_up is None else caught_up,
        "processed": processed,
        "legs": legs,
    }


def describe(result: dict[str, float]) -> str:
    return (
        f"p50 {1e3 * result['p50']:.2f} ms, p99 {1e3 * result['p99']:.2f} ms, "
        f"max {1e3 * result['max']:.1f} ms "
        f"({int(result['count'])} alerts, {int(result['lost'])} lost)"
    )


def capacity(context: dict, key: str, broker: Broker, directory: Path, messages: int) -> tuple[float, float]:
    """Daemon and bare capacity (readings/s), single readings, SQLite: from the ingest run or measured now."""
    outcome = context.get(key)
    if outcome is None:
        case = ingest.Case("sqlite", batch=False, messages=messages)
        lines = ingest.make_lines(directory / f"single-{messages}.jsonl", messages, batch=False)
        outcome = ingest.measure(broker, case, 1, directory, lines)
        context[key] = outcome
    return outcome.daemon.median, outcome.bare.median


def run(report: Report, directory: Path, args, context: dict) -> None:
    with Broker(directory, nodelay=True) as broker:
        daemon_cap, _ = capacity(context, "ingest/sqlite/single", broker, directory, 20_000)
        rate = args.load_rate if args.load_rate is not None else daemon_cap / 2
        result = one_run(broker, directory, rate, args.probes)
        report.add(
            Row(
                "2 alert latency",
                f"set_tcp_nodelay true, load {rate_text(result['load_rate'])} readings (half capacity)",
                describe(result),
                "capacity " + rate_text(daemon_cap),
                "",
                "p50 <= 2 ms, p99 <= 10 ms",
                "meets" if result["p50"] <= 0.002 and result["p99"] <= 0.010 else "ABOVE",
            )
        )
        report.note(
            f"latency (nodelay): {broker.describe()}; mean {1e3 * result['mean']:.2f} ms; "
            f"backlog drained {result['backlog_drain_s']:.1f} s after the load stopped "
            f"(-1: not within 60 s); legs median/p99 ms: {legs_text(result)}"
        )
        quiet = one_run(broker, directory, 0.0, max(100, args.probes // 5))
        report.add(
            Row(
                "2 alert latency",
                "set_tcp_nodelay true, no background load",
                describe(quiet),
                "",
                "",
                "",
                "",
            )
        )
        report.note(f"latency (nodelay, no load): legs median/p99 ms: {legs_text(quiet)}")
        context["latency/nodelay"] = result
    if args.probes_default <= 0:
        return
    with Broker(directory, nodelay=False) as broker:
        case = ingest.Case("sqlite", batch=False, messages=2_000)
        lines = ingest.make_lines(directory / "single-2000.jsonl", 2_000, batch=False)
        outcome = ingest.measure(broker, case, 2, directory, lines)
        ingest.report_outcome(report, outcome, 0.6, prefix="1 ingest, broker default nodelay")
        slow_rate = outcome.daemon.median / 2
        result = one_run(broker, directory, slow_rate, args.probes_default)
        report.add(
            Row(
                "2 alert latency",
                f"broker default (no nodelay), load {rate_text(result['load_rate'])} readings "
                "(half its capacity)",
                describe(result),
                "capacity " + rate_text(outcome.daemon.median),
                "",
                "p50 <= 2 ms, p99 <= 10 ms",
                "meets" if result["p50"] <= 0.002 and result["p99"] <= 0.010 else "ABOVE",
            )
        )
        quiet = one_run(broker, directory, 0.0, args.probes_default)
        report.add(
            Row(
                "2 alert latency",
                "broker default (no nodelay), no background load",
                describe(quiet),
                "",
                "",
                "",
                "",
            )
        )
        report.note(
            f"latency (broker default): {broker.describe()}; "
            f"backlog drained {result['backlog_drain_s']:.1f} s "
            f"after the load stopped (-1: not within 60 s); legs median/p99 ms: {legs_text(result)}; "
            f"without load: {legs_text(quiet)}"
        )
