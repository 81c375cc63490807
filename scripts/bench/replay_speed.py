"""Benchmark 3: ``monitor replay`` over 10 million readings, CSV and Parquet.

The files (columns chart, timestamp as epoch seconds, value; one chart, in-control normal
readings) are generated once under var/bench/ and reused. Timed as operators run it:
``python -m monitor replay --config ... --data FILE --signals-only --out /dev/null`` (a process,
interpreter start and imports included), one chart with subgroups of 5, X-bar/R + EWMA + CUSUM
and the Western Electric rules. The reference in the same run is reading the same file into
numpy arrays with pyarrow alone (``pyarrow.csv.read_csv`` / ``pyarrow.parquet.read_table``), the
floor any replay of that file pays. ``--replay-points`` also times the default output (a JSON
line per plotted point).
"""

from __future__ import annotations

import json
import subprocess
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from common import PYTHON, REPO, VAR, Report, Row, Series, rate_text, verdict

CONFIG = """\
charts:
  - id: press/thickness
    subgroup: {size: 5}
    kinds: [xbar_r, ewma, cusum]
    limits: {mean: 8.0, sigma: 0.04}
    rules: western-electric
"""


def make_files(rows: int) -> tuple[Path, Path]:
    VAR.mkdir(parents=True, exist_ok=True)
    csv_path, parquet_path = VAR / f"replay-{rows}.csv", VAR / f"replay-{rows}.parquet"
    if csv_path.exists() and parquet_path.exists():
        return csv_path, parquet_path
    started = time.monotonic()
    rng = np.random.default_rng(2)
    table = pa.table(
        {
            "chart": pa.array(["press/thickness"] * rows, pa.string()).dictionary_encode(),
            "timestamp": np.round(1_767_225_600.0 + np.arange(rows) * 0.5, 1),
            "value": np.round(rng.normal(8.0, 0.04, size=rows), 4),
        }
    )
    pq.write_table(table, parquet_path)
    pacsv.write_csv(
        table.cast(pa.schema([("chart", pa.string()), ("timestamp", pa.float64()), ("value", pa.float64())])),
        csv_path,
    )
    print(
        f"    generated {csv_path.name} and {parquet_path.name} in {time.monotonic() - started:.0f} s",
        flush=True,
    )
    return csv_path, parquet_path


def bare_read(path: Path) -> float:
    """Seconds to read the file into numpy arrays with pyarrow alone (same columns, same types)."""
    started = time.perf_counter()
    table = pq.read_table(path) if path.suffix == ".parquet" else pacsv.read_csv(path)
    chart = table.column("chart")
    chart = chart.cast(pa.string()) if pa.types.is_dictionary(chart.type) else chart
    np.asarray(table.column("value").to_numpy())
    np.asarray(table.column("timestamp").to_numpy())
    chart.unique()
    return time.perf_counter() - started


def replay_process(config: Path, data: Path, *, points: bool) -> float:
    command = [
        PYTHON,
        "-m",
        "monitor",
        "replay",
        "--config",
        str(config),
        "--data",
        str(data),
        "--out",
        "/dev/null",
    ]
    if not points:
        command.append("--signals-only")
    started = time.perf_counter()
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=False, timeout=1800)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        msg = f"replay failed: {done.stderr[-2000:]}"
        raise RuntimeError(msg)
    return seconds


def in_process(config: Path, data: Path) -> dict[str, float]:
    """Where the time of one replay goes: reading the table, then the charts (no output)."""
    script = f"""
import json, time
from pathlib import Path
from monitor.config import load_config
from monitor import replay
config = load_config(Path({str(config)!r}))
t0 = time.perf_counter()
table = replay.read_table({str(data)!r})
t1 = time.perf_counter()
replay.replay(config, {str(data)!r}, None, points=False)
t2 = time.perf_counter()
print(json.dumps({{"read": t1 - t0, "whole": t2 - t1}}))
"""
    done = subprocess.run(
        [PYTHON, "-c", script], cwd=REPO, capture_output=True, text=True, check=True, timeout=1800
    )
    return json.loads(done.stdout.strip().splitlines()[-1])


def run(report: Report, directory: Path, args) -> None:
    rows = args.replay_rows
    csv_path, parquet_path = make_files(rows)
    config = directory / "replay.yaml"
    config.write_text(CONFIG)
    targets = {".csv": 1e6, ".parquet": 5e6}
    for path in (csv_path, parquet_path):
        replayed, floor, ratio = Series(), Series(), Series()
        for i in range(args.replay_runs):
            for kind in ("replay", "bare") if i % 2 == 0 else ("bare", "replay"):
                if kind == "replay":
                    replayed.add(rows / replay_process(config, path, points=False))
                else:
                    floor.add(rows / bare_read(path))
            ratio.add(replayed.values[-1] / floor.values[-1])
        label = "CSV" if path.suffix == ".csv" else "Parquet"
        report.add(
            Row(
                "3 replay",
                f"{label}, {rows / 1e6:g} M readings, --signals-only (process)",
                f"{rate_text(replayed.median)} readings ({replayed.spread()})",
                f"pyarrow read alone {rate_text(floor.median)}",
                f"{ratio.median:.2f} ({ratio.low:.2f}-{ratio.high:.2f})",
                f">= {rate_text(targets[path.suffix])}",
                verdict(replayed.median, targets[path.suffix]),
            )
        )
        split = in_process(config, path)
        report.note(
            f"replay {label}: in-process, read_table {split['read']:.2f} s of a {split['whole']:.2f} s "
            f"replay (charts and the rest {split['whole'] - split['read']:.2f} s); "
            f"file {path.stat().st_size / 2**20:.0f} MiB"
        )
        if args.replay_points:
            seconds = replay_process(config, path, points=True)
            report.add(
                Row(
                    "3 replay",
                    f"{label}, {rows / 1e6:g} M readings, every point written (process, 1 run)",
                    f"{rate_text(rows / seconds)} readings",
                    "",
                    "",
                    "",
                    "",
                )
            )
