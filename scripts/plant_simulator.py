#!/usr/bin/env python3
"""Readings of an invented plant, for demos only: Brightwater Tile Works.

Brightwater presses, glazes, dries and fires floor tiles on two press lines, a glazing
line, a dryer and a roller kiln, and sorts the fired tiles. Each characteristic runs in
control for a while and then, on a fixed schedule, shows one kind of trouble:

* press-1 tile thickness drifts upward as the die inserts wear;
* press-2 tile thickness jumps when a new powder lot arrives;
* kiln-1 zone-3 temperature starts to wander more widely (a fluttering burner);
* glaze-1 coat weight is charted by one-minute windows and stays in control;
* dryer-1 drying time is right-skewed by nature (no fault: its normal-theory limits
  alone produce false alarms, which the exact laws of later releases correct);
* sort-1 rejects per 200 fired tiles rise when the kiln trouble begins.

All data here are invented. Usage:

    python scripts/plant_simulator.py --minutes 240 --out var/demo/readings.csv
"""

from __future__ import annotations

import argparse
import csv
import math
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

START = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
SITE = "brightwater"


@dataclass(frozen=True)
class Reading:
    chart: str
    topic: str
    time: float
    value: float
    exposure: float | None = None


def _press(rng: np.random.Generator, chart: str, t: float, elapsed: float, trouble: str) -> Reading:
    mean, sd = 8.00, 0.04
    if trouble == "wear" and elapsed > 90 * 60:
        mean += 0.000004 * (elapsed - 90 * 60)  # about +0.0024 mm per 10 minutes of wear
    if trouble == "lot" and elapsed > 120 * 60:
        mean += 0.03
    return Reading(chart, f"{SITE}/{chart}", t, round(float(rng.normal(mean, sd)), 4))


def readings(minutes: float, seed: int = 7) -> Iterator[Reading]:
    """All readings of the plant in time order over ``minutes`` of plant time."""
    rng = np.random.default_rng(seed)
    events: list[tuple[float, str]] = []
    horizon = minutes * 60.0
    for name, every in (
        ("press-1/thickness", 2.0),
        ("press-2/thickness", 2.0),
        ("kiln-1/zone-3-temperature", 20.0),
        ("glaze-1/coat-weight", 12.0),
        ("dryer-1/drying-time", 15.0),
        ("sort-1/rejects", 60.0),
    ):
        offset = float(rng.uniform(0, every))
        events.extend((offset + k * every, name) for k in range(int((horizon - offset) // every) + 1))
    events.sort()
    for elapsed, name in events:
        t = START + elapsed
        if name == "press-1/thickness":
            yield _press(rng, name, t, elapsed, "wear")
        elif name == "press-2/thickness":
            yield _press(rng, name, t, elapsed, "lot")
        elif name == "kiln-1/zone-3-temperature":
            sd = 2.5 if elapsed < 150 * 60 else 4.5
            yield Reading(name, f"{SITE}/{name}", t, round(float(rng.normal(1180.0, sd)), 2))
        elif name == "glaze-1/coat-weight":
            yield Reading(name, f"{SITE}/{name}", t, round(float(rng.normal(42.0, 0.6)), 3))
        elif name == "dryer-1/drying-time":
            # lognormal: median 38 min, strongly right-skewed
            yield Reading(name, f"{SITE}/{name}", t, round(float(38.0 * math.exp(rng.normal(0.0, 0.35))), 2))
        else:
            p = 0.02 if elapsed < 150 * 60 else 0.035
            yield Reading(name, f"{SITE}/{name}", t, float(rng.binomial(200, p)), 200.0)


def write_csv(path: Path, minutes: float, seed: int) -> int:
    """Write the readings as a replay CSV; returns the number of rows."""
    path.parent.mkdir(parents=True, exist_ok=True)
    count = 0
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["chart", "timestamp", "value", "exposure"])
        for r in readings(minutes, seed):
            stamp = (
                datetime.fromtimestamp(r.time, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
            )
            writer.writerow([r.chart, stamp, r.value, "" if r.exposure is None else r.exposure])
            count += 1
    return count


def main() -> None:
    parser = argparse.ArgumentParser(
        description="Readings of the invented Brightwater Tile Works (demo data)."
    )
    parser.add_argument("--minutes", type=float, default=240.0, help="plant time to simulate")
    parser.add_argument("--seed", type=int, default=7, help="random seed")
    parser.add_argument("--out", type=Path, required=True, help="CSV file to write")
    args = parser.parse_args()
    rows = write_csv(args.out, args.minutes, args.seed)
    print(f"wrote {rows} readings of {args.minutes:g} plant minutes to {args.out}")


if __name__ == "__main__":
    main()
