"""The health endpoint over a real loopback socket: liveness, readiness and Prometheus metrics."""

from __future__ import annotations

import asyncio
import json
import math
import socket
import threading
from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from pathlib import Path

import prometheus_client
import pytest
from prometheus_client.openmetrics.parser import text_string_to_metric_families as openmetrics_families
from prometheus_client.parser import text_string_to_metric_families

from monitor.health import (
    OVERFLOW_LABEL,
    DatabaseWatch,
    GaugeSnapshot,
    HealthServer,
    Heartbeat,
    Metrics,
    Readiness,
    ReadinessLimits,
)
from monitor.store import Store
from tests.ops.tools import http_get


class ManualClock:
    """A monotonic clock the test moves by hand."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


@dataclass
class DaemonState:
    """What a daemon would report; the tests change it between requests."""

    broker: bool = True
    database_age: float | None = 1.0
    lag: float = 0.0
    queue_depth: int = 0
    charts: int = 3
    snapshot_fails: bool = False
    snapshots: int = 0
    threads: list[str] = field(default_factory=list)

    def readiness(self) -> Readiness:
        self.threads.append(threading.current_thread().name)
        return Readiness(broker=self.broker, database_age=self.database_age, lag=self.lag)

    def snapshot(self) -> GaugeSnapshot:
        self.snapshots += 1
        if self.snapshot_fails:
            raise RuntimeError("the daemon could not say")
        return GaugeSnapshot(
            queue_depth=self.queue_depth, processing_lag_seconds=self.lag, charts=self.charts
        )


@dataclass
class Running:
    server: HealthServer
    state: DaemonState
    clock: ManualClock
    heartbeat: Heartbeat
    metrics: Metrics

    async def get(self, path: str, accept: str | None = None):
        return await asyncio.to_thread(http_get, self.server.url + path, accept=accept)


@pytest.fixture
async def running() -> AsyncIterator[Running]:
    state = DaemonState()
    clock = ManualClock()
    heartbeat = Heartbeat(clock)
    metrics = Metrics(state.snapshot)
    server = HealthServer(
        port=0,
        heartbeat=heartbeat.age,
        readiness=state.readiness,
        metrics=metrics,
        loop=asyncio.get_running_loop(),
        limits=ReadinessLimits(database_within=30.0, lag_within=60.0, heartbeat_within=60.0),
    )
    server.start()
    try:
        yield Running(server, state, clock, heartbeat, metrics)
    finally:
        await asyncio.to_thread(server.stop)


def families(text: str) -> dict[str, prometheus_client.Metric]:
    return {family.name: family for family in text_string_to_metric_families(text)}


def value(family: prometheus_client.Metric, sample_name: str, **labels: str) -> float:
    for sample in family.samples:
        if sample.name == sample_name and sample.labels == labels:
            return float(sample.value)
    raise AssertionError(f"no sample {sample_name}{labels} in {family.samples}")


# ---------------------------------------------------------------- liveness


async def test_livez_answers_200_while_the_loop_answers_and_the_heartbeat_is_fresh(running: Running):
    """/livez is 200 with {"status": "live"} when the heartbeat is recent."""
    answer = await running.get("/livez")
    assert answer.status == 200
    assert answer.content_type == "application/json"
    assert json.loads(answer.body) == {"status": "live"}


async def test_livez_answers_503_naming_the_heartbeat_when_progress_stops(running: Running):
    """A heartbeat older than the bound makes /livez 503 with the heartbeat named; a new beat heals it."""
    running.clock.now += 75
    answer = await running.get("/livez")
    assert answer.status == 503
    body = json.loads(answer.body)
    assert body["status"] == "not_live"
    assert body["failed"] == {"heartbeat": "no progress for 75 s (limit 60 s)"}
    running.heartbeat.beat()
    assert (await running.get("/livez")).status == 200


async def test_livez_ignores_the_broker_and_the_database(running: Running):
    """With the broker gone and the database silent, /livez stays 200 (outages must not cause restarts)."""
    running.state.broker = False
    running.state.database_age = None
    assert (await running.get("/livez")).status == 200
    assert (await running.get("/readyz")).status == 503


async def test_livez_answers_503_naming_the_event_loop_when_the_loop_is_blocked():
    """When the event loop does not run the check within loop_timeout, /livez says the loop failed."""
    heartbeat = Heartbeat()
    server = HealthServer(
        port=0,
        heartbeat=heartbeat.age,
        readiness=lambda: Readiness(broker=True, database_age=0.0, lag=0.0),
        loop=asyncio.get_running_loop(),
        loop_timeout=0.2,
    )
    server.start()
    try:
        answers = {}
        done = threading.Event()

        def probe() -> None:
            answers["livez"] = http_get(server.url + "/livez")
            answers["readyz"] = http_get(server.url + "/readyz")
            done.set()

        prober = threading.Thread(target=probe)
        prober.start()
        done.wait(60)  # blocks this event loop on purpose while the probes run
        prober.join()
        assert answers["livez"].status == 503
        assert set(json.loads(answers["livez"].body)["failed"]) == {"event_loop"}
        assert answers["readyz"].status == 503
        assert set(json.loads(answers["readyz"].body)["failed"]) == {"event_loop"}
        assert (await asyncio.to_thread(http_get, server.url + "/livez")).status == 200
    finally:
        await asyncio.to_thread(server.stop)


async def test_the_checks_run_on_the_event_loop_thread(running: Running):
    """The readiness callable runs on the daemon's event loop thread, not on the server's threads."""
    await running.get("/readyz")
    assert running.state.threads == [threading.current_thread().name]


# ---------------------------------------------------------------- readiness


async def test_readyz_flips_to_503_when_the_broker_drops_and_back_to_200(running: Running):
    """/readyz is 200, then 503 naming the broker while it is disconnected, then 200 again."""
    first = await running.get("/readyz")
    assert first.status == 200
    assert json.loads(first.body) == {"status": "ready"}
    running.state.broker = False
    down = await running.get("/readyz")
    assert down.status == 503
    assert json.loads(down.body) == {
        "status": "not_ready",
        "failed": {"broker": "not connected and subscribed"},
    }
    running.state.broker = True
    assert (await running.get("/readyz")).status == 200


async def test_readyz_names_a_stale_database_and_a_long_lag(running: Running):
    """A database silent past its bound and a lag past its bound are both named in the 503 body."""
    running.state.database_age = 45.0
    running.state.lag = 120.0
    answer = await running.get("/readyz")
    assert answer.status == 503
    failed = json.loads(answer.body)["failed"]
    assert failed == {
        "database": "no successful round trip for 45 s (limit 30 s)",
        "lag": "processing lags 120 s (limit 60 s)",
    }


async def test_readyz_is_503_before_the_first_database_round_trip(running: Running):
    """No successful round trip yet (database_age None) is not ready."""
    running.state.database_age = None
    answer = await running.get("/readyz")
    assert answer.status == 503
    assert json.loads(answer.body)["failed"] == {"database": "no successful round trip yet"}


async def test_a_readiness_callable_that_raises_gives_503_not_a_crash():
    """A readiness check that raises answers 503 naming the check, and the server keeps serving."""

    def broken() -> Readiness:
        raise RuntimeError("boom")

    server = HealthServer(port=0, heartbeat=lambda: 0.0, readiness=broken, loop=asyncio.get_running_loop())
    with server:
        answer = await asyncio.to_thread(http_get, server.url + "/readyz")
        assert answer.status == 503
        assert json.loads(answer.body)["failed"] == {"readiness": "check failed: RuntimeError"}
        assert (await asyncio.to_thread(http_get, server.url + "/livez")).status == 200


# ---------------------------------------------------------------- metrics


async def test_metrics_expose_the_daemon_counters_with_their_values(running: Running):
    """Counters called by the daemon appear with the line_monitor_ prefix, labels and exact values."""
    m = running.metrics
    m.count_messages(7)
    m.count_readings(30)
    m.count_subgroups(6)
    m.count_signal("press-1/thickness", "beyond_limits")
    m.count_signal("press-1/thickness", "beyond_limits")
    m.count_signal("kiln/k1/temperature", "same_side_run")
    m.count_alert("press-1/thickness", "raised")
    m.count_decode_error("not_json")
    m.count_decode_error("not_json", 2)
    m.count_dead_letter()
    m.count_duplicate("message")
    m.count_duplicate("reading", 4)
    m.count_store_failure()
    m.note_connect()
    m.note_connect()
    m.note_connect()
    answer = await running.get("/metrics")
    assert answer.status == 200
    assert answer.content_type.startswith("text/plain")
    found = families(answer.body.decode())
    assert value(found["line_monitor_messages"], "line_monitor_messages_total") == 7
    assert value(found["line_monitor_readings"], "line_monitor_readings_total") == 30
    assert value(found["line_monitor_subgroups"], "line_monitor_subgroups_total") == 6
    signals = found["line_monitor_signals"]
    assert value(signals, "line_monitor_signals_total", chart="press-1/thickness", rule="beyond_limits") == 2
    assert (
        value(signals, "line_monitor_signals_total", chart="kiln/k1/temperature", rule="same_side_run") == 1
    )
    alerts = found["line_monitor_alerts"]
    assert value(alerts, "line_monitor_alerts_total", chart="press-1/thickness", kind="raised") == 1
    errors = found["line_monitor_decode_errors"]
    assert value(errors, "line_monitor_decode_errors_total", reason="not_json") == 3
    assert value(found["line_monitor_dead_letters"], "line_monitor_dead_letters_total") == 1
    duplicates = found["line_monitor_duplicates"]
    assert value(duplicates, "line_monitor_duplicates_total", kind="message") == 1
    assert value(duplicates, "line_monitor_duplicates_total", kind="reading") == 4
    assert value(found["line_monitor_store_failures"], "line_monitor_store_failures_total") == 1
    assert value(found["line_monitor_mqtt_reconnects"], "line_monitor_mqtt_reconnects_total") == 2


async def test_commit_latency_is_a_histogram_with_count_sum_and_buckets(running: Running):
    """observe_commit fills line_monitor_database_commit_seconds buckets, count and sum."""
    for seconds in (0.002, 0.004, 0.3):
        running.metrics.observe_commit(seconds)
    found = families((await running.get("/metrics")).body.decode())
    histogram = found["line_monitor_database_commit_seconds"]
    assert histogram.type == "histogram"
    name = "line_monitor_database_commit_seconds"
    assert value(histogram, name + "_count") == 3
    assert math.isclose(value(histogram, name + "_sum"), 0.306)
    assert value(histogram, name + "_bucket", le="0.0025") == 1
    assert value(histogram, name + "_bucket", le="0.005") == 2
    assert value(histogram, name + "_bucket", le="0.25") == 2
    assert value(histogram, name + "_bucket", le="0.5") == 3
    assert value(histogram, name + "_bucket", le="+Inf") == 3


async def test_gauges_are_read_from_the_snapshot_at_each_scrape(running: Running):
    """Queue depth, lag and chart count come from the snapshot callable when /metrics is scraped."""
    running.state.queue_depth, running.state.lag, running.state.charts = 12, 2.5, 40
    found = families((await running.get("/metrics")).body.decode())
    assert value(found["line_monitor_queue_depth"], "line_monitor_queue_depth") == 12
    assert value(found["line_monitor_processing_lag_seconds"], "line_monitor_processing_lag_seconds") == 2.5
    assert value(found["line_monitor_charts"], "line_monitor_charts") == 40
    running.state.queue_depth = 0
    found = families((await running.get("/metrics")).body.decode())
    assert value(found["line_monitor_queue_depth"], "line_monitor_queue_depth") == 0
    assert running.state.snapshots == 2


async def test_no_created_series_are_exposed_even_when_the_library_enables_them(running: Running):
    """The exposition has no *_created samples although prometheus_client would add them by default."""
    prometheus_client.enable_created_metrics()
    running.metrics.count_signal("press-1/thickness", "beyond_limits")
    running.metrics.observe_commit(0.01)
    text = (await running.get("/metrics")).body.decode()
    names = {sample.name for family in text_string_to_metric_families(text) for sample in family.samples}
    assert "line_monitor_signals_total" in names
    assert not [name for name in names if name.endswith("_created")]


async def test_metrics_are_openmetrics_when_the_scraper_asks_for_it(running: Running):
    """An OpenMetrics Accept header gets the OpenMetrics format, parseable by its parser, ending in # EOF."""
    running.metrics.count_readings(5)
    answer = await running.get("/metrics", accept="application/openmetrics-text; version=1.0.0")
    assert answer.content_type.startswith("application/openmetrics-text")
    text = answer.body.decode()
    assert text.endswith("# EOF\n")
    found = {family.name: family for family in openmetrics_families(text)}
    assert value(found["line_monitor_readings"], "line_monitor_readings_total") == 5


async def test_the_registry_is_dedicated_not_the_global_one(running: Running):
    """Our metrics are not in prometheus_client's global registry, and its default collectors are not in ours."""
    running.metrics.count_readings()
    global_names = {f.name for f in prometheus_client.REGISTRY.collect()}
    ours = {f.name for f in running.metrics.registry.collect()}
    assert "line_monitor_readings" in ours
    assert "line_monitor_readings" not in global_names
    assert not [name for name in ours if not name.startswith("line_monitor_")]


def test_chart_labels_past_the_bound_are_counted_under_other():
    """With max_charts=2, a third chart's signals are counted under chart="_other" (bounded series)."""
    metrics = Metrics(max_charts=2)
    for chart in ("a", "b", "c", "d", "a"):
        metrics.count_signal(chart, "beyond_limits")
    metrics.count_alert("e", "raised")
    text = metrics.exposition()[0].decode()
    found = families(text)
    signals = found["line_monitor_signals"]
    charts = {s.labels["chart"] for s in signals.samples}
    assert charts == {"a", "b", OVERFLOW_LABEL}
    assert value(signals, "line_monitor_signals_total", chart="a", rule="beyond_limits") == 2
    assert value(signals, "line_monitor_signals_total", chart=OVERFLOW_LABEL, rule="beyond_limits") == 2
    assert (
        value(found["line_monitor_alerts"], "line_monitor_alerts_total", chart=OVERFLOW_LABEL, kind="raised")
        == 1
    )


async def test_gauges_become_nan_when_the_snapshot_fails(running: Running):
    """A snapshot that raises leaves NaN in the gauges (unknown) and the counters still served."""
    running.state.queue_depth = 5
    await running.get("/metrics")
    running.state.snapshot_fails = True
    running.metrics.count_readings(2)
    answer = await running.get("/metrics")
    assert answer.status == 200
    found = families(answer.body.decode())
    assert math.isnan(value(found["line_monitor_queue_depth"], "line_monitor_queue_depth"))
    assert value(found["line_monitor_readings"], "line_monitor_readings_total") == 2


# ---------------------------------------------------------------- the server itself


def _listening_addresses(port: int) -> set[str]:
    """Local addresses the kernel lists as listening on ``port`` (from /proc/net/tcp)."""
    found = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        fields = line.split()
        address, port_hex = fields[1].split(":")
        if int(port_hex, 16) == port and fields[3] == "0A":  # 0A: LISTEN
            found.add(socket.inet_ntoa(bytes.fromhex(address)[::-1]))
    return found


def test_the_endpoint_listens_on_loopback_only_by_default():
    """Without a host, the server binds 127.0.0.1 and nothing else."""
    server = HealthServer(port=0, heartbeat=lambda: 0.0, readiness=lambda: Readiness(True, 0.0, 0.0))
    assert server.host == "127.0.0.1"
    with server:
        assert _listening_addresses(server.port) == {"127.0.0.1"}
        assert http_get(server.url + "/livez").status == 200


def test_all_interfaces_only_when_asked():
    """host="0.0.0.0" binds every interface (for a pod whose probes come from the kubelet)."""
    everywhere = "0.0.0.0"  # noqa: S104 - binding every interface is what is tested
    server = HealthServer(everywhere, 0, heartbeat=lambda: 0.0, readiness=lambda: Readiness(True, 0.0, 0.0))
    with server:
        assert _listening_addresses(server.port) == {everywhere}


def test_stop_closes_the_port_and_can_be_called_twice():
    """After stop() nothing listens on the port any more; a second stop() does nothing."""
    server = HealthServer(port=0, heartbeat=lambda: 0.0, readiness=lambda: Readiness(True, 0.0, 0.0))
    server.start()
    port = server.port
    assert http_get(server.url + "/livez").status == 200
    server.stop()
    server.stop()
    with pytest.raises(ConnectionRefusedError), socket.create_connection(("127.0.0.1", port), timeout=5):
        pass
    assert _listening_addresses(port) == set()


def test_a_port_in_use_raises_at_start():
    """Starting on a port another socket listens on raises OSError (the daemon reports it at start)."""
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        server = HealthServer(port=port, heartbeat=lambda: 0.0, readiness=lambda: Readiness(True, 0.0, 0.0))
        with pytest.raises(OSError):
            server.start()


def test_unknown_paths_answer_404_and_head_has_no_body():
    """Other paths are 404 JSON; HEAD /livez is 200 without a body; a query string is ignored."""
    server = HealthServer(port=0, heartbeat=lambda: 0.0, readiness=lambda: Readiness(True, 0.0, 0.0))
    with server:
        assert http_get(server.url + "/healthz").status == 404
        assert http_get(server.url + "/metrics").status == 404  # no Metrics given
        head = http_get(server.url + "/livez", method="HEAD")
        assert (head.status, head.body) == (200, b"")
        assert http_get(server.url + "/readyz?verbose").status == 200


# ---------------------------------------------------------------- database watch


@pytest.fixture
async def sqlite_store(tmp_path: Path) -> AsyncIterator[Store]:
    store = await Store.open(f"sqlite:///{tmp_path / 'monitor.db'}")
    try:
        yield store
    finally:
        await store.close()


async def test_the_database_watch_records_a_real_ping(sqlite_store: Store):
    """Before any round trip the age is None; a ping of a real SQLite store succeeds and sets it."""
    clock = ManualClock()
    watch = DatabaseWatch(sqlite_store.ping, clock=clock)
    assert watch.age() is None
    assert await watch.ping_once() is True
    clock.now += 4
    assert watch.age() == 4
    assert watch.last_error is None


async def test_a_failed_ping_keeps_the_age_growing_and_names_the_error():
    """A ping that fails (a refused connection) records the error and leaves the last success in place."""
    clock = ManualClock()
    watch = DatabaseWatch(_refused_ping, clock=clock)
    watch.succeeded()
    clock.now += 50
    assert await watch.ping_once() is False
    assert watch.age() == 50
    assert watch.failures == 1
    assert watch.last_error is not None
    assert watch.last_error.startswith("ConnectionRefusedError")


async def _refused_ping() -> float:
    """A round trip to a port where nothing listens (a real refused connection)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    _reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.close()
    return 0.0


async def test_the_database_watch_task_pings_an_idle_database(sqlite_store: Store):
    """run() pings when no commit reported success, so an idle daemon stays ready."""
    watch = DatabaseWatch(sqlite_store.ping, every=0.05)
    task = asyncio.create_task(watch.run())
    try:
        for _ in range(2000):
            if watch.pings >= 2:
                break
            await asyncio.sleep(0.01)
        assert watch.pings >= 2
        assert watch.age() is not None
    finally:
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task


def test_heartbeat_age_counts_from_the_last_beat():
    """Heartbeat.age() is the time since the last beat() on the given clock."""
    clock = ManualClock()
    heartbeat = Heartbeat(clock)
    clock.now += 7
    assert heartbeat.age() == 7
    heartbeat.beat()
    assert heartbeat.age() == 0
