"""The daemon's per-message pipeline without MQTT, stage by stage, in-process (a diagnostic of the suite).

A ``Daemon`` is built from a one-chart configuration (subgroups of 5, X-bar/R + EWMA + CUSUM,
Western Electric rules), given a real store (SQLite file or a fresh PostgreSQL database) and a
stand-in link whose ``ack`` only counts. Batches of messages go through ``Daemon.handle`` and
``Daemon._commit`` exactly as the processing loop calls them; each stage is timed on its own:

* decode alone (``monitor.ingest.decode``) against ``orjson.loads`` of the same payload;
* ``handle`` per message (routing, de-duplication, decode, subgroup, charts, rules, rows);
* checkpoint state per chart (``ChartRuntime.to_state``) and its JSON text;
* ``_commit`` per batch (checkpoints, one store transaction, acks) against the floor: the same
  rows written with the bare driver (stdlib ``sqlite3`` / synchronous ``psycopg``), one
  transaction, JSON by ``orjson``.
"""

from __future__ import annotations

import asyncio
import json
import sqlite3
import statistics
import time
from pathlib import Path

import numpy as np
import orjson
from common import Report, Row, storage, unique, write_config

from monitor.config import load_config
from monitor.daemon import Daemon, _Pending
from monitor.ingest import PayloadMapping, decode
from monitor.logs import configure_logging
from monitor.mqtt import Incoming
from monitor.store import Store

UPSERT = (
    "insert into checkpoints (chart, state, updated_ms) values (?, ?, ?) "
    "on conflict (chart) do update set state = excluded.state, updated_ms = excluded.updated_ms"
)


class CountingLink:
    """Stands in for MqttLink in ``_commit``: acknowledging only counts."""

    connected = True
    queued = 0

    def __init__(self) -> None:
        self.acked = 0

    def ack(self, _message: Incoming) -> bool:
        self.acked += 1
        return True


def payloads(count: int, *, batch: int = 1, seed: int = 5) -> list[bytes]:
    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(8.0, 0.04, size=count * batch), 4).tolist()
    now = time.time()
    out = []
    for m in range(count):
        items = [
            {
                "v": values[m * batch + j],
                "ts": round(now + (m * batch + j) * 0.001, 3),
                "seq": m * batch + j + 1,
            }
            for j in range(batch)
        ]
        out.append(orjson.dumps(items if batch > 1 else items[0]))
    return out


def time_per_call(work, items, repeats: int = 3) -> float:
    """Median over ``repeats`` of the seconds per item of ``work(item)`` over all items."""
    runs = []
    for _ in range(repeats):
        started = time.perf_counter()
        for item in items:
            work(item)
        runs.append((time.perf_counter() - started) / len(items))
    return statistics.median(runs)


async def pipeline(
    url: str, directory: Path, *, per_batch: int, batches: int, batch: int = 1
) -> dict[str, float]:
    name = unique("stg")
    topic = f"bench/{name}/in"
    from common import chart_yaml  # noqa: PLC0415

    config_path = write_config(
        directory / f"{name}.yaml",
        port=1,
        client_id=f"monitor-{name}",
        prefix=f"bench/{name}/monitor",
        charts=chart_yaml("press/thickness", topic, batch=batch > 1),
        url=url,
        health_port=1,
    )
    config = load_config(config_path)
    daemon = Daemon(config, config_path)
    store = await Store.open(daemon.url)
    daemon.store = store
    link = CountingLink()
    daemon.link = link  # type: ignore[assignment]
    bodies = payloads(per_batch * (batches + 5), batch=batch)
    now = time.time()
    messages = [
        Incoming(
            topic=topic, payload=body, mid=(k % 65535) + 1, qos=1, retain=False, received_at=now, generation=1
        )
        for k, body in enumerate(bodies)
    ]
    handle_s: list[float] = []
    commit_s: list[float] = []
    for b in range(batches + 5):
        pending = _Pending()
        started = time.perf_counter()
        for message in messages[b * per_batch : (b + 1) * per_batch]:
            daemon.handle(message, pending)
        handled = time.perf_counter()
        await daemon._commit(pending)
        done = time.perf_counter()
        if b >= 5:  # the first batches fill caches
            handle_s.append(handled - started)
            commit_s.append(done - handled)
    runtime = next(iter(daemon.runtimes.values()))
    state_s = time_per_call(lambda _: runtime.to_state(), range(2000))
    state = runtime.to_state()
    json_s = time_per_call(lambda _: json.dumps(state), range(2000))
    orjson_s = time_per_call(lambda _: orjson.dumps(state), range(2000))
    guard_s = time_per_call(lambda _: daemon.guard.checkpoint(), range(2000))
    await store.close()
    return {
        "handle_us_per_msg": 1e6 * statistics.median(handle_s) / per_batch,
        "commit_ms": 1e3 * statistics.median(commit_s),
        "commit_us_per_msg": 1e6 * statistics.median(commit_s) / per_batch,
        "state_us": 1e6 * state_s,
        "state_json_us": 1e6 * json_s,
        "state_orjson_us": 1e6 * orjson_s,
        "state_bytes": len(json.dumps(state)),
        "guard_us": 1e6 * guard_s,
        "acked": link.acked,
    }


def floor_sqlite(path: str, *, per_batch: int, batches: int) -> float:
    """Seconds per transaction writing what one batch writes, with the stdlib driver and orjson."""
    db = sqlite3.connect(path, isolation_level=None)
    for pragma in ("journal_mode=WAL", "synchronous=NORMAL", "foreign_keys=ON"):
        db.execute(f"PRAGMA {pragma}")
    columns = [row[1] for row in db.execute("PRAGMA table_info(subgroups)")]
    chart = unique("floor/")
    db.executemany(
        "insert into charts (chart, first_seen_ms) values (?, ?)", [(chart, 0), ("@link/" + chart, 0)]
    )
    points = {
        "xbar_r": {
            "mean": {"value": 8.0, "center": 8.0, "lower": 7.9, "upper": 8.1},
            "range": {"value": 0.1, "center": 0.09, "lower": 0.0, "upper": 0.2},
        },
        "ewma": {"ewma": {"value": 8.0, "center": 8.0, "lower": 7.9, "upper": 8.1}},
        "cusum": {
            "upper": {"value": 0.0, "center": 0.0, "lower": None, "upper": 5.0},
            "lower": {"value": 0.0, "center": 0.0, "lower": None, "upper": 5.0},
        },
    }
    state = {
        "schema": 1,
        "chart_set": {"charts": [points] * 3, "history": list(range(50))},
        "grouper": {"pending": [8.0] * 4},
    }
    subgroups = per_batch // 5
    extra = ", readings" if "readings" in columns else ""
    marks = ", ?" if extra else ""
    times = []
    index = 0
    for b in range(batches + 5):
        started = time.perf_counter()
        db.execute("begin")
        db.executemany(
            "insert into charts (chart, first_seen_ms) values (?, ?) on conflict do nothing",
            [(chart, 0), ("@link/" + chart, 0)],
        )
        rows = []
        for _ in range(subgroups):
            row = [chart, index, 0, 0, 5, orjson.dumps(points).decode()]
            if extra:
                row.append(orjson.dumps({"values": [8.0] * 5, "exposures": None}).decode())
            rows.append(row)
            index += 1
        db.executemany(
            f"insert into subgroups (chart, idx, start_ms, end_ms, n, points{extra}) "  # noqa: S608 - fixed text
            f"values (?, ?, ?, ?, ?, ?{marks}) "
            "on conflict do nothing",
            rows,
        )
        db.executemany(
            UPSERT,
            [
                (chart, orjson.dumps(state).decode(), 0),
                ("@link/" + chart, orjson.dumps({"messages": [[chart, 1, "x"]] * per_batch * 2}).decode(), 0),
            ],
        )
        db.execute("commit")
        if b >= 5:
            times.append(time.perf_counter() - started)
    db.close()
    return statistics.median(times)


def floor_postgres(url: str, *, per_batch: int, batches: int) -> float:
    import psycopg  # noqa: PLC0415

    with psycopg.connect(url) as db:
        columns = [
            r[0]
            for r in db.execute(
                "select column_name from information_schema.columns where table_name = 'subgroups'"
            )
        ]
        db.commit()
        chart = unique("floor/")
        extra = ", readings" if "readings" in columns else ""
        marks = ", %s" if extra else ""
        points = orjson.dumps(
            {"xbar_r": {"mean": {"value": 8.0, "center": 8.0, "lower": 7.9, "upper": 8.1}}}
        ).decode()
        state = orjson.dumps({"schema": 1, "history": list(range(200))}).decode()
        times = []
        index = 0
        for b in range(batches + 5):
            started = time.perf_counter()
            with db.transaction():
                with db.cursor() as cursor:
                    cursor.executemany(
                        "insert into charts (chart, first_seen_ms) values (%s, %s) on conflict do nothing",
                        [(chart, 0), ("@link/" + chart, 0)],
                    )
                rows = []
                for _ in range(per_batch // 5):
                    row = [chart, index, 0, 0, 5, points]
                    if extra:
                        row.append(orjson.dumps({"values": [8.0] * 5, "exposures": None}).decode())
                    rows.append(row)
                    index += 1
                with db.cursor() as cursor:
                    cursor.executemany(
                        f"insert into subgroups (chart, idx, start_ms, end_ms, n, points{extra}) "  # noqa: S608
                        f"values (%s, %s, %s, %s, %s, %s{marks}) on conflict do nothing",
                        rows,
                    )
                    cursor.executemany(
                        UPSERT.replace("?", "%s"),
                        [(chart, state, 0), ("@link/" + chart, state, 0)],
                    )
            if b >= 5:
                times.append(time.perf_counter() - started)
    return statistics.median(times)


def run(
    report: Report, directory: Path, *, stores: list[str], per_batch: int = 40, batches: int = 200
) -> dict:
    configure_logging(level="warning")
    mapping = PayloadMapping(format="json", value="v", timestamp="ts", sequence="seq")
    single = payloads(20_000)
    received = time.time()
    decode_s = time_per_call(lambda body: decode(body, mapping, received), single)
    loads_s = time_per_call(orjson.loads, single)
    report.add(
        Row(
            "stages",
            "decode one JSON reading (monitor.ingest.decode)",
            f"{1e6 * decode_s:.2f} us/msg",
            f"orjson.loads {1e6 * loads_s:.2f} us",
            f"{decode_s / loads_s:.1f}x",
            "",
            "",
        )
    )
    batch_mapping = PayloadMapping(format="json", value="v", timestamp="ts", sequence="seq", batch="array")
    batched = payloads(300, batch=100)
    decode_b = time_per_call(lambda body: decode(body, batch_mapping, received), batched)
    loads_b = time_per_call(orjson.loads, batched)
    report.add(
        Row(
            "stages",
            "decode a 100-reading JSON batch",
            f"{1e4 * decode_b:.2f} us/reading",
            f"orjson.loads {1e4 * loads_b:.2f} us/reading",
            f"{decode_b / loads_b:.1f}x",
            "",
            "",
        )
    )
    results: dict[str, dict[str, float]] = {}
    for kind in stores:
        with storage(kind, directory) as url:
            figures = asyncio.run(pipeline(url, directory, per_batch=per_batch, batches=batches))
            if kind == "sqlite":
                floor = floor_sqlite(url.removeprefix("sqlite:///"), per_batch=per_batch, batches=batches)
            else:
                floor = floor_postgres(url, per_batch=per_batch, batches=batches)
            big = asyncio.run(pipeline(url, directory, per_batch=10, batches=100, batch=100))
        label = "SQLite" if kind == "sqlite" else "PostgreSQL"
        total = figures["handle_us_per_msg"] + figures["commit_us_per_msg"]
        report.add(
            Row(
                "stages",
                f"{label}: Daemon.handle per single-reading message",
                f"{figures['handle_us_per_msg']:.1f} us/msg",
                "",
                "",
                "",
                "",
            )
        )
        report.add(
            Row(
                "stages",
                f"{label}: Daemon._commit of {per_batch} messages ({per_batch // 5} subgroups)",
                f"{figures['commit_ms']:.2f} ms ({figures['commit_us_per_msg']:.1f} us/msg)",
                f"bare driver + orjson {1e3 * floor:.2f} ms",
                f"{figures['commit_ms'] / (1e3 * floor):.1f}x",
                "",
                "",
            )
        )
        report.add(
            Row(
                "stages",
                f"{label}: handle + commit without MQTT (ceiling of the loop)",
                f"{1e6 / total / 1e3:.1f} k msgs/s",
                "",
                "",
                "",
                "",
            )
        )
        report.add(
            Row(
                "stages",
                f"{label}: 100-reading batch messages, handle per reading",
                f"{big['handle_us_per_msg'] / 100:.2f} us/reading",
                "",
                "",
                "",
                "",
            )
        )
        results[kind] = figures
        results[kind + "/batch"] = big
        report.note(
            f"stages {label}: checkpoint of one chart: to_state {figures['state_us']:.1f} us, json.dumps "
            f"{figures['state_json_us']:.1f} us (orjson {figures['state_orjson_us']:.1f} us), "
            f"{figures['state_bytes']} bytes; link checkpoint (redelivery guard) "
            f"{figures['guard_us']:.1f} us; "
            f"batch messages: commit {big['commit_ms']:.2f} ms per 10 messages (1000 readings)"
        )
    return results
