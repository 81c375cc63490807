#!/usr/bin/env python3
"""Readings of an invented plant, for demos only: Brightwater Tile Works.

Brightwater presses, glazes, dries and fires floor tiles on two press lines, a glazing
line, a dryer and a roller kiln, and sorts the fired tiles. Each characteristic runs in
control for a while and then, on a fixed schedule, shows one kind of trouble:

* press-1 tile thickness drifts upward as the die inserts wear (from minute 10);
* press-2 tile thickness jumps when a new powder lot arrives (minute 20);
* kiln-1 zone-3 temperature starts to wander more widely, a fluttering burner (minute 30);
* glaze-1 coat weight is charted by one-minute windows and stays in control;
* dryer-1 drying time is right-skewed by nature (no fault: normal-theory limits alone
  give it false alarms);
* sort-1 rejects per 200 fired tiles rise when the kiln trouble begins (minute 30).

All data here are invented. Two ways to use it:

    python scripts/plant_simulator.py --minutes 240 --out var/demo/readings.csv
    python scripts/plant_simulator.py --publish 127.0.0.1:1883 --speed 30 --seconds 120

The second publishes JSON readings ({"value": .., "ts": .., "seq": ..}) to
``brightwater/<chart id>`` at QoS 1, in real time sped up ``--speed`` times (timestamps are
the wall-clock publishing times, so the daemon sees a live plant).
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

START = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
SITE = "brightwater"

SENSORS: tuple[tuple[str, float], ...] = (
    ("press-1/thickness", 2.0),
    ("press-2/thickness", 2.0),
    ("kiln-1/zone-3-temperature", 20.0),
    ("glaze-1/coat-weight", 12.0),
    ("dryer-1/drying-time", 15.0),
    ("sort-1/rejects", 60.0),
)
"""Each characteristic and the seconds between its readings (plant time)."""


@dataclass(frozen=True)
class Reading:
    """One simulated reading at ``elapsed`` plant seconds after the start."""

    chart: str
    elapsed: float
    value: float
    exposure: float | None = None

    @property
    def topic(self) -> str:
        return f"{SITE}/{self.chart}"

    @property
    def time(self) -> float:
        """Event time when the plant run starts at START (for files)."""
        return START + self.elapsed


def _value(rng: np.random.Generator, chart: str, elapsed: float) -> tuple[float, float | None]:
    minute = elapsed / 60.0
    if chart == "press-1/thickness":
        wear = 0.0002 * max(0.0, minute - 10.0)  # 0.002 mm per 10 minutes
        return round(float(rng.normal(8.00 + wear, 0.04)), 4), None
    if chart == "press-2/thickness":
        lot = 0.03 if minute > 20.0 else 0.0
        return round(float(rng.normal(8.00 + lot, 0.04)), 4), None
    if chart == "kiln-1/zone-3-temperature":
        sd = 2.5 if minute < 30.0 else 4.5
        return round(float(rng.normal(1180.0, sd)), 2), None
    if chart == "glaze-1/coat-weight":
        return round(float(rng.normal(42.0, 0.6)), 3), None
    if chart == "dryer-1/drying-time":
        # lognormal: median 38 minutes, strongly right-skewed
        return round(float(38.0 * math.exp(rng.normal(0.0, 0.35))), 2), None
    p = 0.02 if minute < 30.0 else 0.035
    return float(rng.binomial(200, p)), 200.0


def condition(chart: str, elapsed: float) -> str:
    """The label of the plant's condition at a reading: in control, or the trouble it has."""
    minute = elapsed / 60.0
    trouble = {
        "press-1/thickness": (10.0, "die inserts wearing"),
        "press-2/thickness": (20.0, "new powder lot"),
        "kiln-1/zone-3-temperature": (30.0, "burner fluttering"),
        "sort-1/rejects": (30.0, "kiln trouble"),
    }.get(chart)
    return trouble[1] if trouble is not None and minute > trouble[0] else "in control"


def readings(minutes: float, seed: int = 7) -> Iterator[Reading]:
    """All readings of the plant in time order over ``minutes`` of plant time."""
    rng = np.random.default_rng(seed)
    horizon = minutes * 60.0
    events: list[tuple[float, str]] = []
    for name, every in SENSORS:
        offset = float(rng.uniform(0, every))
        events.extend((offset + k * every, name) for k in range(int((horizon - offset) // every) + 1))
    events.sort()
    for elapsed, name in events:
        value, exposure = _value(rng, name, elapsed)
        yield Reading(name, elapsed, value, exposure)


def _iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def write_csv(path: Path, minutes: float, seed: int) -> int:
    """Write the readings as a replay CSV; returns the number of rows."""
    path.parent.mkdir(parents=True, exist_ok=True)
    count = 0
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["chart", "timestamp", "value", "exposure", "label"])
        for r in readings(minutes, seed):
            exposure = "" if r.exposure is None else r.exposure
            writer.writerow([r.chart, _iso(r.time), r.value, exposure, condition(r.chart, r.elapsed)])
            count += 1
    return count


def publish(address: str, speed: float, seconds: float, seed: int) -> int:
    """Publish readings live to the broker at ``address``; returns how many were published."""
    import paho.mqtt.client as mqtt  # noqa: PLC0415 - only the live mode needs it

    host, _, port = address.partition(":")
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"brightwater-simulator-{seed}")
    client.connect(host, int(port or 1883))
    client.loop_start()
    started = time.time()
    count = 0
    try:
        for reading in readings(seconds * speed / 60.0, seed):
            due = started + reading.elapsed / speed
            pause = due - time.time()
            if pause > 0:
                time.sleep(pause)
            now = time.time()
            # microseconds of the wall clock: increases on every topic, across runs too
            body: dict[str, object] = {"value": reading.value, "ts": _iso(now), "seq": int(now * 1e6)}
            if reading.exposure is not None:
                body["inspected"] = reading.exposure
            client.publish(reading.topic, json.dumps(body), qos=1).wait_for_publish(timeout=10)
            count += 1
    finally:
        client.loop_stop()
        client.disconnect()
    return count


def main() -> None:
    parser = argparse.ArgumentParser(
        description="Readings of the invented Brightwater Tile Works (demo data)."
    )
    parser.add_argument("--minutes", type=float, default=240.0, help="plant time to write to --out")
    parser.add_argument("--seed", type=int, default=7, help="random seed")
    parser.add_argument("--out", type=Path, help="CSV file to write")
    parser.add_argument("--publish", metavar="HOST:PORT", help="publish live to this MQTT broker instead")
    parser.add_argument("--speed", type=float, default=30.0, help="live mode: plant seconds per real second")
    parser.add_argument("--seconds", type=float, default=120.0, help="live mode: real seconds to run")
    args = parser.parse_args()
    if args.publish:
        count = publish(args.publish, args.speed, args.seconds, args.seed)
        print(f"published {count} readings to {args.publish}")
    elif args.out:
        rows = write_csv(args.out, args.minutes, args.seed)
        print(f"wrote {rows} readings of {args.minutes:g} plant minutes to {args.out}")
    else:
        parser.error("give --out FILE or --publish HOST:PORT")


if __name__ == "__main__":
    main()
