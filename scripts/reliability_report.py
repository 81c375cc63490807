"""Turn the figures the fault tests recorded into docs/RELIABILITY.md."""

from __future__ import annotations

import json
import os
import platform
import sys
from pathlib import Path

EXPLAIN = {
    "crash": "kill -9 of the daemon three times during a steady QoS 1 stream (400 readings/s), "
    "restarting it each time",
    "database outage": "PostgreSQL stopped for 30 s under a steady QoS 1 stream (100 readings/s), "
    "intake bounded",
    "broker restart": "the broker stopped and started again between two parts of a stream",
    "flood": "one topic at 10x its configured rate while another chart raises an alert",
    "bad input": "a catalogue of malformed payloads between good readings, with dead letters on",
}


def main() -> None:
    source, target = Path(sys.argv[1]), Path(sys.argv[2])
    latest: dict[str, dict[str, object]] = {}
    for line in source.read_text().splitlines():
        item = json.loads(line)
        latest[str(item["scenario"])] = item
    lines = [
        "# Reliability figures",
        "",
        "Measured by the fault tests in `tests/shell/test_daemon.py` against real Mosquitto and",
        "PostgreSQL, and collected by `scripts/reliability_report` (run it to refresh this page).",
        "Each test also asserts its outcome, so a figure here that broke a promise would have failed CI.",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}.",
        "",
    ]
    for scenario, item in latest.items():
        lines.append(f"## {scenario.capitalize()}")
        lines.append("")
        lines.append(EXPLAIN.get(scenario, scenario) + f" (measured {item['at']}).")
        lines.append("")
        lines.append("| figure | value |")
        lines.append("|---|---|")
        for key, value in item.items():
            if key not in ("scenario", "at"):
                lines.append(f"| {key.replace('_', ' ')} | {value} |")
        lines.append("")
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text("\n".join(lines))


if __name__ == "__main__":
    main()
