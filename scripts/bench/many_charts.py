"""Benchmark 4: many charts, one topic each, fed round-robin: throughput and memory per chart.

The daemon (a process, SQLite) keeps either one chart, or C charts from one placeholder template
(``id: cell/{cell}/thickness``, ``topic: bench/<run>/{cell}/in``), or C fixed charts (one YAML
entry each). Every chart: subgroups of 5, X-bar/R + EWMA + CUSUM, Western Electric rules. The
same number of messages is published in every case by ``rr_publisher.py`` (paho, QoS 1,
round-robin over the topics, at full speed), so the one-chart case is the same-run reference.

Memory: the daemon's resident set (VmRSS) after the run; per chart = (RSS with C charts - RSS
with one chart) / C. Start-up: from starting the process to its broker connection.
"""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

from common import (
    PYTHON,
    Broker,
    DaemonProcess,
    Report,
    Row,
    chart_yaml,
    free_port,
    last_commit_seconds,
    process_memory_mib,
    rate_text,
    storage,
    unique,
    write_config,
)
from ingest import WARM_READINGS, warm

HERE = Path(__file__).resolve().parent


def one(
    broker: Broker, directory: Path, *, charts: int, mode: str, messages: int, hooks: dict | None = None
) -> dict[str, float]:
    """mode: 'one' (a single chart), 'template' or 'fixed'; hooks: on_start(daemon), on_done(daemon)."""
    hooks = hooks or {}
    name = unique("mc")
    base = f"bench/{name}"
    if mode == "one":
        chart_text = chart_yaml("cell/only/thickness", f"{base}/only/in")
        template, fan = f"{base}/only/in", 1
    elif mode == "template":
        chart_text = chart_yaml("cell/{cell}/thickness", base + "/{cell}/in")
        template, fan = base + "/c{i:05d}/in", charts
    else:
        chart_text = "".join(
            chart_yaml(f"cell/c{i:05d}/thickness", f"{base}/c{i:05d}/in") for i in range(charts)
        )
        template, fan = base + "/c{i:05d}/in", charts
    with storage("sqlite", directory) as url:
        health = free_port()
        config = write_config(
            directory / f"{name}.yaml",
            port=broker.port,
            client_id=f"monitor-{name}",
            prefix=f"mon/{name}",
            charts=chart_text + chart_yaml("warm/up", f"{base}-warm"),
            url=url,
            health_port=health,
        )
        daemon = DaemonProcess(config, directory / f"{name}.log", health).start()
        try:
            warm(broker.port, f"{base}-warm", directory)
            daemon.wait_readings(WARM_READINGS, timeout=120.0)
            idle_rss, _ = process_memory_mib(daemon.pid)
            if hooks.get("on_start"):
                hooks["on_start"](daemon)
            done = subprocess.run(
                [PYTHON, str(HERE / "rr_publisher.py"), str(broker.port), template, str(fan), str(messages)],
                capture_output=True,
                text=True,
                check=True,
                timeout=3600,
            )
            published = json.loads(done.stdout.strip().splitlines()[-1])
            after = daemon.wait_readings(
                messages + WARM_READINGS, timeout=max(300.0, messages / 100), interval=0.2
            )
            rss, peak = process_memory_mib(daemon.pid)
            if hooks.get("on_done"):
                hooks["on_done"](daemon)
            commits = after.get("line_monitor_database_commit_seconds_count", 0.0)
            commit_s = after.get("line_monitor_database_commit_seconds_sum", 0.0)
            started_in = daemon.started_in
        finally:
            daemon.stop(timeout=600)
        end = last_commit_seconds(url)
    if end is None:
        msg = "no checkpoint stored"
        raise RuntimeError(msg)
    return {
        "rate": messages / (end + (commit_s / commits if commits else 0.0) - published["started"]),
        "publisher_rate": messages / (published["finished"] - published["started"]),
        "rss": rss,
        "peak": peak,
        "idle_rss": idle_rss,
        "start_s": started_in,
        "commit_ms": 1e3 * commit_s / commits if commits else float("nan"),
        "msgs_per_commit": (messages + WARM_READINGS) / commits if commits else float("nan"),
    }


def run(report: Report, directory: Path, args) -> None:
    charts = args.charts
    messages = charts * args.chart_rounds
    with Broker(directory) as broker:
        for _ in range(args.chart_repeats):
            base = one(broker, directory, charts=1, mode="one", messages=messages)
            print(f"    one chart: {rate_text(base['rate'])} readings, RSS {base['rss']:.0f} MiB", flush=True)
            many = one(broker, directory, charts=charts, mode="template", messages=messages)
            print(
                f"    {charts} template charts: {rate_text(many['rate'])} readings, "
                f"RSS {many['rss']:.0f} MiB",
                flush=True,
            )
            per_chart_kib = (many["rss"] - base["rss"]) * 1024 / charts
            report.add(
                Row(
                    "4 many charts",
                    f"{charts} charts from one {{cell}} template, {args.chart_rounds} readings each, "
                    "round-robin",
                    f"{rate_text(many['rate'])} readings; RSS {many['rss']:.0f} MiB "
                    f"({per_chart_kib:.0f} KiB/chart)",
                    f"1 chart {rate_text(base['rate'])}, RSS {base['rss']:.0f} MiB",
                    f"{many['rate'] / base['rate']:.2f}",
                    "<= 500 MB; >= 0.8 x one chart",
                    "meets"
                    if many["rss"] * 1.048576 <= 500 and many["rate"] >= 0.8 * base["rate"]
                    else "BELOW",
                )
            )
            report.note(
                f"many charts, template: {messages} messages; commits {many['commit_ms']:.1f} ms for "
                f"{many['msgs_per_commit']:.0f} messages each (one chart: {base['commit_ms']:.1f} ms for "
                f"{base['msgs_per_commit']:.0f}); peak RSS {many['peak']:.0f} MiB; publisher alone "
                f"{rate_text(many['publisher_rate'])}"
            )
            if args.fixed_charts:
                fixed_messages = args.fixed_charts * args.chart_rounds
                same = (
                    base
                    if fixed_messages == messages
                    else one(broker, directory, charts=1, mode="one", messages=fixed_messages)
                )
                fixed = one(
                    broker, directory, charts=args.fixed_charts, mode="fixed", messages=fixed_messages
                )
                per_fixed = (fixed["rss"] - same["rss"]) * 1024 / args.fixed_charts
                report.add(
                    Row(
                        "4 many charts",
                        f"{args.fixed_charts} fixed charts (one YAML entry each), "
                        f"{args.chart_rounds} readings each",
                        f"{rate_text(fixed['rate'])} readings; RSS {fixed['rss']:.0f} MiB "
                        f"({per_fixed:.0f} KiB/chart); "
                        f"start-up {fixed['start_s']:.1f} s",
                        f"1 chart {rate_text(same['rate'])}; start-up {same['start_s']:.1f} s",
                        f"{fixed['rate'] / same['rate']:.2f}",
                        ">= 0.8 x one chart",
                        verdict_ratio(fixed["rate"] / same["rate"]),
                    )
                )


def verdict_ratio(ratio: float) -> str:
    return "meets" if ratio >= 0.8 else "BELOW"
