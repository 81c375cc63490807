"""Health, readiness and Prometheus metrics over HTTP, for supervisors and scrapers.

An optional endpoint (127.0.0.1 unless another address is configured) serves:

``/livez``
    200 while the event loop answers and the processing loop's heartbeat is fresh. It checks
    neither the broker nor the database: an outage of either must not turn into restarts.
``/readyz``
    200 when the broker link is connected and subscribed, the database answered recently and
    the processing lag is within bounds; otherwise 503 with a short JSON body naming the checks
    that failed.
``/metrics``
    Prometheus text exposition (OpenMetrics when the scraper asks for it) of a dedicated
    registry (:class:`Metrics`), without ``_created`` series.

The server runs in its own thread, so it answers even when the event loop is stuck; everything
it asks of the daemon (heartbeat, readiness, the gauge snapshot) runs on the event loop through
``call_soon_threadsafe`` and must answer within ``loop_timeout`` seconds. Not answering is itself
the failure that ``/livez`` reports.

Typical wiring in the daemon::

    heartbeat = Heartbeat()                          # beat() on every pass of the loop
    database = DatabaseWatch(store.ping)             # succeeded() after each commit; run() as a task
    metrics = Metrics(snapshot=lambda: GaugeSnapshot(link.queued, lag()))
    server = HealthServer(host, port, heartbeat=heartbeat.age, readiness=readiness,
                          metrics=metrics, loop=asyncio.get_running_loop())
    server.start()                                   # OSError if the port is taken
    ...
    await asyncio.to_thread(server.stop)             # stop() waits up to 0.2 s for the thread
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import math
import socket
import socketserver
import threading
import time
from collections.abc import Awaitable, Callable, Iterable
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Final, Literal, Self, TypeVar

import orjson
from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.exposition import choose_encoder
from prometheus_client.metrics_core import Metric
from prometheus_client.registry import Collector

__all__ = [
    "OVERFLOW_LABEL",
    "DatabaseWatch",
    "GaugeSnapshot",
    "HealthServer",
    "Heartbeat",
    "Metrics",
    "Readiness",
    "ReadinessLimits",
    "liveness_failures",
    "readiness_failures",
]

_T = TypeVar("_T")

OVERFLOW_LABEL: Final = "_other"
"""Label value for every chart (or reason) past the cardinality bound; no chart id starts with '_'."""

COMMIT_BUCKETS: Final = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
"""Upper bounds (seconds) of the commit latency histogram."""


# ---------------------------------------------------------------- progress and readiness


class Heartbeat:
    """When the processing loop last made progress or last idled with nothing to do.

    The daemon calls :meth:`beat` on every pass of its loop (a pass that waited for messages
    and got none counts) and on every retry while the database is away; :meth:`age` is what
    ``/livez`` and the systemd watchdog look at.

    Examples:
        >>> heartbeat = Heartbeat()
        >>> heartbeat.beat()
        >>> heartbeat.age() < 60
        True
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._last = clock()

    def beat(self) -> None:
        """Note progress now."""
        self._last = self._clock()

    def age(self) -> float:
        """Seconds since the last :meth:`beat` (or since creation)."""
        return max(0.0, self._clock() - self._last)


@dataclass(frozen=True, slots=True)
class Readiness:
    """What the daemon says about itself when asked whether it is ready.

    Attributes:
        broker: the MQTT link is connected and its subscriptions are made.
        database_age: seconds since the last successful database round trip (a commit or a
            ping); None if there has been none.
        lag: processing lag in seconds: how long the oldest message received and not yet
            committed has waited (0 when nothing waits).
    """

    broker: bool
    database_age: float | None
    lag: float


@dataclass(frozen=True, slots=True)
class ReadinessLimits:
    """Bounds that ``/readyz`` and ``/livez`` apply.

    Attributes:
        database_within: the database must have answered within this many seconds.
        lag_within: the processing lag must be at most this many seconds.
        heartbeat_within: ``/livez`` fails when the heartbeat is older than this.
    """

    database_within: float = 30.0
    lag_within: float = 60.0
    heartbeat_within: float = 60.0


def _seconds(value: float) -> str:
    return f"{value:.0f} s" if value >= 10 else f"{value:.1f} s"


def readiness_failures(readiness: Readiness, limits: ReadinessLimits) -> dict[str, str]:
    """The readiness checks that fail, each with a short reason (empty: ready).

    Examples:
        >>> readiness_failures(Readiness(broker=True, database_age=1.0, lag=0.0), ReadinessLimits())
        {}
        >>> readiness_failures(Readiness(broker=False, database_age=None, lag=0.0), ReadinessLimits())
        {'broker': 'not connected and subscribed', 'database': 'no successful round trip yet'}
    """
    failed: dict[str, str] = {}
    if not readiness.broker:
        failed["broker"] = "not connected and subscribed"
    age = readiness.database_age
    if age is None:
        failed["database"] = "no successful round trip yet"
    elif not age <= limits.database_within:
        failed["database"] = (
            f"no successful round trip for {_seconds(age)} (limit {_seconds(limits.database_within)})"
        )
    if not readiness.lag <= limits.lag_within:
        failed["lag"] = f"processing lags {_seconds(readiness.lag)} (limit {_seconds(limits.lag_within)})"
    return failed


def liveness_failures(heartbeat_age: float, limits: ReadinessLimits) -> dict[str, str]:
    """The liveness checks that fail (empty: alive).

    Examples:
        >>> liveness_failures(75.0, ReadinessLimits())
        {'heartbeat': 'no progress for 75 s (limit 60 s)'}
    """
    if heartbeat_age <= limits.heartbeat_within:
        return {}
    return {
        "heartbeat": f"no progress for {_seconds(heartbeat_age)} (limit {_seconds(limits.heartbeat_within)})"
    }


class DatabaseWatch:
    """When the database last answered: commits report their success; an idle database is pinged.

    Args:
        ping: one round trip to the database (``Store.ping``); any exception means it failed.
        every: ping when no round trip succeeded for this many seconds.
        timeout: a ping that takes longer than this counts as failed.
        clock: monotonic seconds.

    Run :meth:`run` as a task; call :meth:`succeeded` after every successful commit so that a
    busy daemon does not ping at all.
    """

    def __init__(
        self,
        ping: Callable[[], Awaitable[object]],
        *,
        every: float = 10.0,
        timeout: float = 5.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._ping = ping
        self.every = every
        self.timeout = timeout
        self._clock = clock
        self._last_success: float | None = None
        self.last_error: str | None = None
        self.pings = 0
        self.failures = 0

    def succeeded(self) -> None:
        """Note a successful round trip now (a commit, or a ping)."""
        self._last_success = self._clock()
        self.last_error = None

    def failed(self, error: str) -> None:
        """Note a failed round trip (the age keeps growing)."""
        self.failures += 1
        self.last_error = error

    def age(self) -> float | None:
        """Seconds since the last successful round trip; None if none succeeded yet."""
        if self._last_success is None:
            return None
        return max(0.0, self._clock() - self._last_success)

    async def ping_once(self) -> bool:
        """Ping now; True if the database answered within the timeout."""
        self.pings += 1
        try:
            async with asyncio.timeout(self.timeout):
                await self._ping()
        except Exception as exc:  # noqa: BLE001 - any failure means the database did not answer
            self.failed(f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__)
            return False
        self.succeeded()
        return True

    async def run(self) -> None:
        """Ping whenever no round trip succeeded for :attr:`every` seconds, until cancelled."""
        while True:
            age = self.age()
            if age is None or age >= self.every:
                await self.ping_once()
                await asyncio.sleep(self.every)
            else:
                await asyncio.sleep(self.every - age)


# ---------------------------------------------------------------- metrics


@dataclass(frozen=True, slots=True)
class GaugeSnapshot:
    """Gauge values taken from the daemon at scrape time.

    Attributes:
        queue_depth: messages received and not yet taken by the processor.
        processing_lag_seconds: the lag as in :class:`Readiness`.
        charts: charts this instance keeps (None: leave the gauge out of this scrape's update).
    """

    queue_depth: int
    processing_lag_seconds: float
    charts: int | None = None


class _BoundedLabel:
    """Passes up to ``limit`` distinct label values through; later new ones become :data:`OVERFLOW_LABEL`."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self._seen: set[str] = set()

    def __call__(self, value: str) -> str:
        if value in self._seen:
            return value
        if len(self._seen) < self.limit:
            self._seen.add(value)
            return value
        return OVERFLOW_LABEL


class _WithoutCreated(Collector):
    """The metrics of a registry without the ``_created`` samples of counters and histograms."""

    _TYPES: Final = frozenset({"counter", "histogram", "summary", "gaugehistogram"})

    def __init__(self, inner: CollectorRegistry) -> None:
        self._inner = inner

    def collect(self) -> Iterable[Metric]:
        for family in self._inner.collect():
            if family.type not in self._TYPES:
                yield family
                continue
            created = family.name + "_created"
            kept = Metric(family.name, family.documentation, family.type, family.unit)
            kept.samples = [s for s in family.samples if s.name != created]
            yield kept


class Metrics:
    """The daemon's Prometheus metrics, in a registry of their own.

    Args:
        snapshot: called at scrape time (on the event loop, through :class:`HealthServer`) to
            set the gauges; None leaves them at what :meth:`set_gauges` last set.
        max_charts: distinct ``chart`` label values kept; later charts are counted under
            ``chart="_other"`` so that a topic wildcard cannot grow the series without bound.
        max_reasons: the same bound for the ``reason`` label.

    Every name starts with ``line_monitor_``; counters end in ``_total``. Labels are bounded:
    chart, rule, alert kind, refusal reason, duplicate kind; never anything per reading.
    """

    def __init__(
        self,
        snapshot: Callable[[], GaugeSnapshot] | None = None,
        *,
        max_charts: int = 2000,
        max_reasons: int = 64,
    ) -> None:
        self._snapshot = snapshot
        self._chart = _BoundedLabel(max_charts)
        self._reason = _BoundedLabel(max_reasons)
        self._connects = 0
        inner = CollectorRegistry()
        self._inner = inner
        self.registry = CollectorRegistry()
        """What to expose: the metrics without ``_created`` series."""
        self.registry.register(_WithoutCreated(inner))
        p = "line_monitor_"
        self.messages = Counter(p + "messages", "MQTT messages taken from the chart topics.", registry=inner)
        self.readings = Counter(p + "readings", "Readings accepted into subgroups.", registry=inner)
        self.subgroups = Counter(p + "subgroups", "Subgroups completed and charted.", registry=inner)
        self.signals = Counter(
            p + "signals", "Out-of-control signals, by chart and rule.", ["chart", "rule"], registry=inner
        )
        self.alerts = Counter(
            p + "alerts",
            "Alerts created, by chart and kind (raised, repeated, cleared).",
            ["chart", "kind"],
            registry=inner,
        )
        self.decode_errors = Counter(
            p + "decode_errors",
            "Messages or readings refused, by reason (not_json, missing_field, ...).",
            ["reason"],
            registry=inner,
        )
        self.dead_letters = Counter(
            p + "dead_letters", "Refused messages copied to the dead-letter topic.", registry=inner
        )
        self.duplicates = Counter(
            p + "duplicates",
            "Duplicates dropped: messages the broker sent again, readings whose sequence did not increase.",
            ["kind"],
            registry=inner,
        )
        self.store_failures = Counter(
            p + "store_failures", "Database operations that failed (each retry counts).", registry=inner
        )
        self.mqtt_reconnects = Counter(
            p + "mqtt_reconnects", "Connections to the broker after the first one.", registry=inner
        )
        self.commit_seconds = Histogram(
            p + "database_commit_seconds",
            "Duration of each successful database commit.",
            buckets=COMMIT_BUCKETS,
            registry=inner,
        )
        self.queue_depth = Gauge(
            p + "queue_depth", "Messages received and not yet taken by the processor.", registry=inner
        )
        self.processing_lag = Gauge(
            p + "processing_lag_seconds",
            "How long the oldest received and uncommitted message has waited.",
            registry=inner,
        )
        self.charts = Gauge(p + "charts", "Charts this instance keeps.", registry=inner)
        for kind in ("message", "reading"):  # known label values start at 0, so rate() sees the first one
            self.duplicates.labels(kind=kind)

    # -- counters the daemon calls

    def count_messages(self, n: int = 1) -> None:
        """Messages taken from the chart topics."""
        self.messages.inc(n)

    def count_readings(self, n: int = 1) -> None:
        """Readings accepted."""
        self.readings.inc(n)

    def count_subgroups(self, n: int = 1) -> None:
        """Subgroups charted."""
        self.subgroups.inc(n)

    def count_signal(self, chart: str, rule: str, n: int = 1) -> None:
        """Signals of one rule on one chart."""
        self.signals.labels(chart=self._chart(chart), rule=rule).inc(n)

    def count_alert(self, chart: str, kind: str) -> None:
        """One alert (``raised``, ``repeated`` or ``cleared``) on one chart."""
        self.alerts.labels(chart=self._chart(chart), kind=kind).inc()

    def count_decode_error(self, reason: str, n: int = 1) -> None:
        """Refusals for one reason."""
        self.decode_errors.labels(reason=self._reason(reason)).inc(n)

    def count_dead_letter(self, n: int = 1) -> None:
        """Refused messages published to the dead-letter topic."""
        self.dead_letters.inc(n)

    def count_duplicate(self, kind: Literal["message", "reading"], n: int = 1) -> None:
        """Duplicates dropped: a ``message`` the broker sent again, or a ``reading`` by sequence."""
        self.duplicates.labels(kind=kind).inc(n)

    def count_store_failure(self, n: int = 1) -> None:
        """Failed database operations."""
        self.store_failures.inc(n)

    def note_connect(self) -> None:
        """Call after every successful broker connect; each one after the first counts as a reconnect."""
        self._connects += 1
        if self._connects > 1:
            self.mqtt_reconnects.inc()

    def observe_commit(self, seconds: float) -> None:
        """The duration of one successful commit."""
        self.commit_seconds.observe(seconds)

    # -- gauges

    def set_gauges(self, snapshot: GaugeSnapshot) -> None:
        """Set the gauges from a snapshot."""
        self.queue_depth.set(snapshot.queue_depth)
        self.processing_lag.set(snapshot.processing_lag_seconds)
        if snapshot.charts is not None:
            self.charts.set(snapshot.charts)

    def refresh(self) -> None:
        """Take the snapshot (if one was given) and set the gauges; run it on the event loop."""
        if self._snapshot is not None:
            self.set_gauges(self._snapshot())

    def mark_gauges_unknown(self) -> None:
        """Set the snapshot gauges to NaN: the daemon could not be asked (stale values would mislead)."""
        self.queue_depth.set(math.nan)
        self.processing_lag.set(math.nan)

    def exposition(self, accept: str | None = None) -> tuple[bytes, str]:
        """The encoded metrics and their content type, for an HTTP ``Accept`` header."""
        encoder, content_type = choose_encoder(accept or "")
        return encoder(self.registry), content_type


# ---------------------------------------------------------------- the HTTP server


class _LoopTimeout(Exception):
    """The event loop did not run a call in time (or is closed)."""


class _Server(ThreadingHTTPServer):
    daemon_threads = True
    allow_reuse_address = True
    owner: HealthServer

    def server_bind(self) -> None:
        # HTTPServer.server_bind resolves the host name (socket.getfqdn), which can wait on DNS.
        socketserver.TCPServer.server_bind(self)
        host, port = self.server_address[:2]
        self.server_name = str(host)
        self.server_port = int(port)


class _Server6(_Server):
    address_family = socket.AF_INET6


class _Handler(BaseHTTPRequestHandler):
    server_version = "line-monitor"
    sys_version = ""
    timeout = 10

    def do_GET(self) -> None:
        self._answer(body=True)

    def do_HEAD(self) -> None:
        self._answer(body=False)

    def _answer(self, *, body: bool) -> None:
        server = self.server
        assert isinstance(server, _Server)  # noqa: S101 - the handler only runs inside _Server
        path = self.path.split("?", 1)[0]
        status, payload, content_type = server.owner.respond(path, self.headers.get("Accept"))
        self.send_response(status)
        self.send_header("Content-Type", content_type)
        self.send_header("Content-Length", str(len(payload)))
        self.send_header("Cache-Control", "no-store")
        self.end_headers()
        if body:
            self.wfile.write(payload)

    def log_message(self, format: str, *args: object) -> None:  # noqa: A002 - the base class names it
        """Scrapes and probes are not logged (they come every few seconds)."""


_JSON = "application/json"


def _json(status: str, failed: dict[str, str] | None = None) -> bytes:
    body: dict[str, object] = {"status": status}
    if failed:
        body["failed"] = failed
    return orjson.dumps(body)


class HealthServer:
    """HTTP endpoint for ``/livez``, ``/readyz`` and ``/metrics``, served from a thread.

    Args:
        host: address to listen on; the default is loopback only. Give ``0.0.0.0`` (or ``::``)
            only where a supervisor or scraper on another host must reach it (a Kubernetes pod).
        port: TCP port; 0 picks a free one (see :attr:`port`).
        heartbeat: seconds since the processing loop last made progress (:meth:`Heartbeat.age`).
        readiness: the daemon's :class:`Readiness` now.
        metrics: what ``/metrics`` serves; None answers 404 there.
        loop: the daemon's event loop; the three callables run on it. None runs them in the
            server's thread and skips the event-loop check (for programs without asyncio).
        limits: the bounds of the checks.
        loop_timeout: seconds the event loop has to run a call before ``/livez`` fails.
    """

    def __init__(
        self,
        host: str = "127.0.0.1",
        port: int = 9410,
        *,
        heartbeat: Callable[[], float],
        readiness: Callable[[], Readiness],
        metrics: Metrics | None = None,
        loop: asyncio.AbstractEventLoop | None = None,
        limits: ReadinessLimits | None = None,
        loop_timeout: float = 2.0,
    ) -> None:
        self.host = host
        self._requested_port = port
        self.heartbeat = heartbeat
        self.readiness = readiness
        self.metrics = metrics
        self.loop = loop
        self.limits = limits or ReadinessLimits()
        self.loop_timeout = loop_timeout
        self._server: _Server | None = None
        self._thread: threading.Thread | None = None

    # -- life cycle

    def start(self) -> None:
        """Bind and start serving in a thread; raises OSError if the address cannot be bound."""
        if self._server is not None:
            return
        kind = _Server6 if ":" in self.host else _Server
        server = kind((self.host, self._requested_port), _Handler)
        server.owner = self
        self._server = server
        self._thread = threading.Thread(
            target=server.serve_forever, kwargs={"poll_interval": 0.2}, name="monitor.health", daemon=True
        )
        self._thread.start()

    def stop(self) -> None:
        """Stop serving, close the socket and wait for the thread (idempotent)."""
        server, thread = self._server, self._thread
        self._server = self._thread = None
        if server is None:
            return
        server.shutdown()
        server.server_close()
        if thread is not None:
            thread.join()

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    @property
    def port(self) -> int:
        """The port listened on (useful with port 0)."""
        if self._server is None:
            raise RuntimeError("the health server is not running")
        return int(self._server.server_address[1])

    @property
    def url(self) -> str:
        """Base URL of the endpoint, e.g. ``http://127.0.0.1:9410``."""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    # -- answers

    def _on_loop(self, call: Callable[[], _T]) -> _T:
        """Run ``call`` on the event loop and return its result; _LoopTimeout if it does not run in time."""
        loop = self.loop
        if loop is None:
            return call()
        future: concurrent.futures.Future[_T] = concurrent.futures.Future()

        def run() -> None:
            if not future.set_running_or_notify_cancel():
                return
            try:
                future.set_result(call())
            except Exception as exc:  # noqa: BLE001 - handed to the waiting thread
                future.set_exception(exc)

        try:
            loop.call_soon_threadsafe(run)
        except RuntimeError as exc:  # the loop is closed
            raise _LoopTimeout from exc
        try:
            return future.result(self.loop_timeout)
        except concurrent.futures.TimeoutError:
            future.cancel()
            raise _LoopTimeout from None

    def _loop_failure(self) -> dict[str, str]:
        return {"event_loop": f"did not answer within {_seconds(self.loop_timeout)}"}

    def livez(self) -> tuple[int, bytes]:
        """Status and body of ``/livez``."""
        try:
            age = self._on_loop(self.heartbeat)
        except _LoopTimeout:
            return 503, _json("not_live", self._loop_failure())
        except Exception as exc:  # noqa: BLE001 - a failing check is an answer, not a crash
            return 503, _json("not_live", {"heartbeat": f"check failed: {type(exc).__name__}"})
        failed = liveness_failures(age, self.limits)
        return (503, _json("not_live", failed)) if failed else (200, _json("live"))

    def readyz(self) -> tuple[int, bytes]:
        """Status and body of ``/readyz``."""
        try:
            readiness = self._on_loop(self.readiness)
        except _LoopTimeout:
            return 503, _json("not_ready", self._loop_failure())
        except Exception as exc:  # noqa: BLE001 - a failing check is an answer, not a crash
            return 503, _json("not_ready", {"readiness": f"check failed: {type(exc).__name__}"})
        failed = readiness_failures(readiness, self.limits)
        return (503, _json("not_ready", failed)) if failed else (200, _json("ready"))

    def respond(self, path: str, accept: str | None) -> tuple[int, bytes, str]:
        """Status, body and content type for a GET of ``path``."""
        if path == "/livez":
            return (*self.livez(), _JSON)
        if path == "/readyz":
            return (*self.readyz(), _JSON)
        metrics = self.metrics
        if path == "/metrics" and metrics is not None:
            try:
                self._on_loop(metrics.refresh)
            except _LoopTimeout:
                metrics.mark_gauges_unknown()
            except Exception:  # noqa: BLE001 - serve the counters even when the snapshot fails
                metrics.mark_gauges_unknown()
            body, content_type = metrics.exposition(accept)
            return 200, body, content_type
        return 404, _json("not_found"), _JSON
