"""Operating the daemon: health and metrics, systemd notifications, reload on SIGHUP, shards.

Against the real broker and PostgreSQL; metrics are read with the Prometheus client's own
exposition parser, notifications from a real AF_UNIX datagram socket.
"""

from __future__ import annotations

import contextlib
import signal
import socket
import urllib.error
import urllib.request
import uuid
from pathlib import Path

import psycopg
import pytest
from prometheus_client.parser import text_string_to_metric_families
from psycopg import sql

from monitor.sharding import owner
from tests.shell.harness import PrivateBroker, free_port, publish, sqlite_rows, wait_until, wipe_session
from tests.shell.test_daemon import PRESS, Plant, readings

pytestmark = pytest.mark.broker


def http(url: str) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=5) as response:  # noqa: S310 - loopback test URL
            return response.status, response.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def metric(body: bytes, name: str) -> float:
    total = 0.0
    for family in text_string_to_metric_families(body.decode()):
        for sample in family.samples:
            if sample.name == name:
                total += sample.value
    return total


def test_health_readiness_and_metrics_are_served_and_follow_the_broker(tmp_path):
    """/livez, /readyz and /metrics answer; readiness drops when the broker goes and returns with it."""
    broker = PrivateBroker(tmp_path).start()
    plant = Plant(tmp_path, port=broker.port)
    port = free_port()
    plant.write(PRESS, extra=f"health: {{host: 127.0.0.1, port: {port}}}\n")
    daemon = plant.daemon().start()
    base = f"http://127.0.0.1:{port}"
    try:
        publish(plant.topic("press/thickness"), readings([8.0, 8.01, 7.99, 8.0, 8.3]), port=broker.port)
        assert wait_until(lambda: len(sqlite_rows(plant.db, "select idx from subgroups")) == 1)
        assert http(f"{base}/livez")[0] == 200
        assert wait_until(lambda: http(f"{base}/readyz")[0] == 200)
        status, body = http(f"{base}/metrics")
        assert status == 200
        assert metric(body, "line_monitor_readings_total") == 5
        assert metric(body, "line_monitor_subgroups_total") == 1
        # the mean 8.062 is above 8.054 and the range 0.31 above 0.197: two signals
        assert metric(body, "line_monitor_signals_total") == 2
        broker.stop()
        assert wait_until(lambda: http(f"{base}/readyz")[0] == 503, timeout=20)
        assert b"broker" in http(f"{base}/readyz")[1]
        assert http(f"{base}/livez")[0] == 200  # a broker outage is not a reason to restart
        broker.start()
        assert wait_until(lambda: http(f"{base}/readyz")[0] == 200, timeout=30)
    finally:
        daemon.stop()
        broker.stop()


def test_systemd_hears_ready_watchdog_and_stopping(tmp_path):
    """With NOTIFY_SOCKET and WATCHDOG_USEC set, the daemon sends READY=1, WATCHDOG=1 and STOPPING=1."""
    plant = Plant(tmp_path)
    plant.write(PRESS)
    path = Path("/tmp") / f"notify-{uuid.uuid4().hex[:8]}.sock"  # noqa: S108 - AF_UNIX paths must be short
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    listener.bind(str(path))
    listener.settimeout(0.2)
    heard: list[str] = []
    try:
        daemon = plant.daemon(NOTIFY_SOCKET=str(path), WATCHDOG_USEC="1000000").start()

        def listen_for(word: str) -> bool:
            with contextlib.suppress(TimeoutError):
                heard.append(listener.recv(4096).decode())
            return any(word in h for h in heard)

        assert wait_until(lambda: listen_for("READY=1"), timeout=20)
        assert wait_until(lambda: listen_for("WATCHDOG=1"), timeout=20)
        daemon.stop()
        assert wait_until(lambda: listen_for("STOPPING=1"), timeout=5)
    finally:
        listener.close()
        path.unlink(missing_ok=True)
        wipe_session(plant.client_id)


def test_sighup_reloads_changed_charts_and_refuses_a_broken_file(tmp_path):
    """SIGHUP adds a chart and reconfigures another in place; a broken file is refused, the old one stays."""
    plant = Plant(tmp_path)
    plant.write(PRESS)
    daemon = plant.daemon().start()
    try:
        publish(plant.topic("press/thickness"), readings([8.0, 8.01, 7.99, 8.0, 8.02, 8.0, 8.01]))
        assert wait_until(lambda: len(sqlite_rows(plant.db, "select idx from subgroups")) == 1)
        good = plant.config.read_text()
        plant.config.write_text("charts: [this is: not a chart\n")
        assert daemon.process is not None
        daemon.process.send_signal(signal.SIGHUP)
        daemon.wait_log("config_reload_refused", 10)
        added = (
            "  - id: kiln/temperature\n"
            f'    topic: "test/{plant.name}/kiln/temperature"\n'
            "    subgroup: {size: 1}\n"
            "    kinds: [individuals_mr]\n"
            "    limits: {mean: 1180, sigma: 2.5}\n"
        )
        plant.config.write_text(good.replace("rules: western-electric", "rules: nelson") + added)
        daemon.process.send_signal(signal.SIGHUP)
        daemon.wait_log("config_reloaded", 10)
        publish(f"test/{plant.name}/kiln/temperature", ["1180.5", "1179.0"])
        publish(
            plant.topic("press/thickness"), readings([8.0, 8.01, 7.99], start_seq=8, start_s=1_767_600_007.0)
        )
        assert wait_until(lambda: len(sqlite_rows(plant.db, "select idx from subgroups")) == 4)
    finally:
        daemon.stop()
    reloaded = [e for e in daemon.events() if e.get("event") == "config_reloaded"]
    assert reloaded[0]["added"] == ["kiln/temperature"]
    assert reloaded[0]["changed"] == ["press/thickness"]
    rows = sqlite_rows(plant.db, "select chart, idx, n from subgroups order by chart, idx")
    # press: the 2 readings waiting at the reload completed subgroup 1 with 3 new ones
    assert rows == [
        ("kiln/temperature", 0, 1),
        ("kiln/temperature", 1, 1),
        ("press/thickness", 0, 5),
        ("press/thickness", 1, 5),
    ]


@pytest.mark.db
def test_three_shards_share_the_charts_and_a_stopped_one_resumes_without_loss(tmp_path):
    """Three daemons, one PostgreSQL: each chart kept by exactly one; a restarted shard continues its charts."""
    name = f"monitor_shards_test_{uuid.uuid4().hex[:12]}"
    admin = "host=127.0.0.1 port=5432 user=postgres dbname=postgres"
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    broker = PrivateBroker(tmp_path).start()
    plant = Plant(tmp_path, port=broker.port, storage_url=f"postgresql://postgres@127.0.0.1:5432/{name}")
    charts = [f"cell-{i}/width" for i in range(12)]
    plant.write(
        "".join(
            f'- id: {chart}\n  topic: "{{root}}/{chart}"\n  subgroup: {{{{size: 2}}}}\n'
            "  kinds: [xbar_r]\n  limits: {{mean: 10, sigma: 1}}\n  rules: none\n"
            for chart in charts
        )
    )
    shards = []

    def start(index: int):
        process = plant.daemon(MONITOR_SHARD_INDEX=str(index), MONITOR_SHARD_COUNT="3")
        process.log = tmp_path / f"shard-{index}.log"
        return process.start()

    def counts() -> dict[str, int]:
        with psycopg.connect(f"host=127.0.0.1 port=5432 user=postgres dbname={name}") as connection:
            return dict(connection.execute("select chart, count(*) from subgroups group by chart").fetchall())

    try:
        shards = [start(i) for i in range(3)]
        for chart in charts:
            publish(f"test/{plant.name}/{chart}", ["10.1", "9.9", "10.0", "10.2"], port=broker.port)
        assert wait_until(lambda: counts() == dict.fromkeys(charts, 2), timeout=30)
        shards[1].stop()
        for chart in charts:  # shard 1's readings wait in its broker session meanwhile
            publish(f"test/{plant.name}/{chart}", ["9.8", "10.1", "10.3"], port=broker.port)
        shards[1] = start(1)
        for chart in charts:
            publish(f"test/{plant.name}/{chart}", ["9.9"], port=broker.port)
        assert wait_until(lambda: counts() == dict.fromkeys(charts, 4), timeout=30)
    finally:
        for shard in shards:
            if shard.process is not None:
                shard.stop()
        broker.stop()
        with psycopg.connect(admin, autocommit=True) as connection:
            connection.execute(
                sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name))
            )
    for index, shard in enumerate(shards):
        kept = {e["chart"] for e in shard.events() if e.get("event") == "checkpoint_restored"} | {
            c for c in charts if owner(c, 3) == index
        }
        assert kept == {c for c in charts if owner(c, 3) == index}
        assert f"shard {index} of 3" in shard.stderr
    assert sorted(owner(c, 3) for c in charts) != [0] * 12  # the charts really are spread
