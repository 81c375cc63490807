"""Test harness for the daemon against the real broker and databases.

The daemon runs as its own process (``python -m monitor run``), exactly as operators run it.
Readings go in through ``mosquitto_pub`` and alerts come out through ``mosquitto_sub``: real
clients from outside the project. Every test gets its own topics, alert prefix and client id,
and the broker sessions it leaves are wiped afterwards.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path

BROKER = ("127.0.0.1", 1883)
DAEMON_START_TIMEOUT = 30.0


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on now."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@dataclass(frozen=True)
class Certificates:
    """A throw-away CA with a server certificate for 127.0.0.1 and a client certificate."""

    ca: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


def make_certificates(workdir: Path, *, client_name: str = "line-monitor") -> Certificates:
    """Generate the certificates with the openssl command-line tool (valid one day)."""

    def openssl(*args: str) -> None:
        subprocess.run(["openssl", *args], check=True, capture_output=True, timeout=60)

    ca_key, ca = workdir / "ca.key", workdir / "ca.pem"
    openssl(
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        str(ca_key),
        "-out",
        str(ca),
        "-days",
        "1",
        "-subj",
        "/CN=Line Monitor Test CA",
    )
    made = {}
    for name, subject, extension in (
        ("server", "/CN=127.0.0.1", "subjectAltName=IP:127.0.0.1"),
        ("client", f"/CN={client_name}", "extendedKeyUsage=clientAuth"),
    ):
        key, csr, cert = workdir / f"{name}.key", workdir / f"{name}.csr", workdir / f"{name}.pem"
        ext = workdir / f"{name}.ext"
        ext.write_text(extension + "\n")
        openssl(
            "req", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key), "-out", str(csr), "-subj", subject
        )
        openssl(
            "x509",
            "-req",
            "-in",
            str(csr),
            "-CA",
            str(ca),
            "-CAkey",
            str(ca_key),
            "-CAcreateserial",
            "-out",
            str(cert),
            "-days",
            "1",
            "-extfile",
            str(ext),
        )
        made[name] = (cert, key)
    return Certificates(ca, made["server"][0], made["server"][1], made["client"][0], made["client"][1])


class PrivateBroker:
    """A Mosquitto of the test's own, on its own port, sized for the test (stoppable, restartable).

    Its offline queue is large: the stock configuration keeps only 1000 QoS 1 messages per
    offline session and drops newer ones, which a test of a stopped daemon would mistake for loss.
    """

    def __init__(self, workdir: Path, port: int | None = None, *, tls: Certificates | None = None) -> None:
        self.port = port or free_port()
        self.conf = workdir / f"mosquitto-{self.port}.conf"
        listener = f"listener {self.port} 127.0.0.1\n"
        if tls is not None:
            listener += (
                f"cafile {tls.ca}\ncertfile {tls.server_cert}\nkeyfile {tls.server_key}\n"
                "require_certificate true\nuse_identity_as_username true\n"
            )
        # run as root, Mosquitto would switch to its own user, which cannot read the test's files
        keep_user = "user root\n" if os.geteuid() == 0 else ""
        self.conf.write_text(
            f"{listener}{keep_user}allow_anonymous true\npersistence false\n"
            "max_queued_messages 1000000\nmax_inflight_messages 100\nset_tcp_nodelay true\n"
        )
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> PrivateBroker:
        binary = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        self.process = subprocess.Popen(
            [binary, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            with (
                contextlib.suppress(OSError),
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5),
            ):
                return self
            time.sleep(0.05)
        raise AssertionError(f"private Mosquitto did not start on port {self.port}")

    def stop(self) -> None:
        if self.process is not None:
            self.process.terminate()
            self.process.wait(timeout=10)
            self.process = None


def unique(prefix: str = "t") -> str:
    """A short unique name for topics, prefixes and client ids."""
    return f"{prefix}{uuid.uuid4().hex[:10]}"


def publish(topic: str, payloads: Iterable[str], *, qos: int = 1, port: int = BROKER[1]) -> None:
    """Publish each payload as one message with mosquitto_pub (one process, in order)."""
    lines = "\n".join(payloads) + "\n"
    subprocess.run(
        ["mosquitto_pub", "-h", BROKER[0], "-p", str(port), "-t", topic, "-q", str(qos), "-l"],
        input=lines.encode(),
        check=True,
        timeout=60,
    )


def wipe_session(client_id: str, port: int = BROKER[1]) -> None:
    """Remove the broker's persistent session of ``client_id`` (connect once with a clean session)."""
    subprocess.run(
        [
            "mosquitto_sub",
            "-h",
            BROKER[0],
            "-p",
            str(port),
            "-i",
            client_id,
            "-t",
            f"wipe/{client_id}",
            "-W",
            "1",
            "-C",
            "1",
        ],
        check=False,
        capture_output=True,
        timeout=10,
    )


class Subscriber:
    """mosquitto_sub in the background, collecting (topic, payload) of every message."""

    def __init__(self, topic_filter: str, *, port: int = BROKER[1]) -> None:
        self.messages: list[tuple[str, str]] = []
        self._lock = threading.Lock()
        self._process = subprocess.Popen(
            ["mosquitto_sub", "-h", BROKER[0], "-p", str(port), "-t", topic_filter, "-q", "1", "-v"],
            stdout=subprocess.PIPE,
            stderr=subprocess.DEVNULL,
        )
        self._thread = threading.Thread(target=self._read, daemon=True)
        self._thread.start()
        time.sleep(0.3)  # let the subscription reach the broker

    def _read(self) -> None:
        stream = self._process.stdout
        if stream is None:
            return
        for raw in stream:
            topic, _, payload = raw.decode().rstrip("\n").partition(" ")
            with self._lock:
                self.messages.append((topic, payload))

    def wait_for(self, count: int, timeout: float = 20.0, *, where: str = "") -> list[tuple[str, str]]:
        """At least ``count`` messages (whose topic contains ``where``), waiting up to ``timeout``."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            found = self.matching(where)
            if len(found) >= count:
                return found
            time.sleep(0.05)
        return self.matching(where)

    def matching(self, where: str = "") -> list[tuple[str, str]]:
        with self._lock:
            return [m for m in self.messages if where in m[0]]

    def close(self) -> None:
        self._process.terminate()
        self._process.wait(timeout=10)
        self._thread.join(timeout=10)
        if self._process.stdout is not None:
            self._process.stdout.close()


@dataclass
class DaemonProcess:
    """One ``monitor run`` process with its log."""

    config: Path
    log: Path
    process: subprocess.Popen[bytes] | None = None
    env: dict[str, str] = field(default_factory=dict)
    stderr: str = ""

    def start(self, *, wait_connected: float = DAEMON_START_TIMEOUT) -> DaemonProcess:
        environment = {**os.environ, **self.env}
        with self.log.open("ab") as log:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "monitor", "run", "--config", str(self.config), "--log-level", "info"],
                stdout=log,
                stderr=subprocess.PIPE,
                env=environment,
            )
        self.wait_log("mqtt_connected", wait_connected)
        return self

    def rss_mb(self) -> float:
        """Resident memory of the daemon process now, in MiB (from /proc)."""
        if self.process is None:
            return 0.0
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
        return 0.0

    def cpu_seconds(self) -> float:
        """CPU time the daemon process has used so far (user + system, from /proc)."""
        if self.process is None:
            return 0.0
        fields = Path(f"/proc/{self.process.pid}/stat").read_text().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def events(self) -> list[dict[str, object]]:
        out = []
        for line in self.log_text().splitlines():
            try:
                item = json.loads(line)
            except ValueError:
                continue
            if isinstance(item, dict):
                out.append(item)
        return out

    def wait_log(self, event: str, timeout: float, count: int = 1) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if sum(1 for e in self.events() if e.get("event") == event) >= count:
                return
            if self.process is not None and self.process.poll() is not None:
                raise AssertionError(
                    f"daemon exited early: {self._drain_stderr()}\n{self.log_text()[-3000:]}"
                )
            time.sleep(0.05)
        raise AssertionError(f"no {event!r} in the daemon log within {timeout} s:\n{self.log_text()[-3000:]}")

    def _drain_stderr(self) -> str:
        process = self.process
        if process is not None and process.stderr is not None and process.poll() is not None:
            self.stderr += process.stderr.read().decode(errors="replace")
            process.stderr.close()
        return self.stderr

    def stop(self, timeout: float = 30.0) -> int:
        """SIGTERM and wait: the daemon flushes, checkpoints and disconnects."""
        if self.process is None:
            return 0
        self.process.send_signal(signal.SIGTERM)
        code = self.process.wait(timeout=timeout)
        self._drain_stderr()
        self.process = None
        return code

    def kill(self) -> None:
        """SIGKILL: no chance to flush anything."""
        if self.process is None:
            return
        self.process.kill()
        self.process.wait(timeout=10)
        self._drain_stderr()
        self.process = None


def wait_until(predicate: object, timeout: float = 20.0, step: float = 0.1) -> bool:
    """Poll ``predicate()`` until true or ``timeout``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():  # type: ignore[operator]
            return True
        time.sleep(step)
    return bool(predicate())  # type: ignore[operator]


def sqlite_rows(path: Path, query: str, *args: object) -> list[tuple[object, ...]]:
    """Rows of a query on the daemon's SQLite file (read-only, outside the daemon)."""
    if not path.exists():
        return []
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10) as db:
        try:
            return list(db.execute(query, args))
        except sqlite3.OperationalError:
            return []


class PrivatePostgres:
    """A PostgreSQL cluster of the test's own (initdb in a temporary directory), to stop and start at will."""

    def __init__(self) -> None:
        versions = sorted(
            Path("/usr/lib/postgresql").glob("*/bin/initdb"), key=lambda p: int(p.parent.parent.name)
        )
        if not versions:
            raise AssertionError(
                "PostgreSQL server binaries are not installed (scripts/services installs them)"
            )
        self.bin = versions[-1].parent
        self.dir = Path(tempfile.mkdtemp(prefix="monitor-pg-"))
        self.data = self.dir / "data"
        self.port = free_port()
        self.dir.chmod(0o777)
        self._run("initdb", "-D", str(self.data), "-U", "postgres", "--auth=trust", "-E", "UTF8")

    @property
    def url(self) -> str:
        return f"postgresql://postgres@127.0.0.1:{self.port}/postgres"

    def _run(self, tool: str, *args: str) -> None:
        command = [str(self.bin / tool), *args]
        if os.geteuid() == 0:  # the server refuses to run as root
            command = ["runuser", "-u", "postgres", "--", *command]
        subprocess.run(command, check=True, capture_output=True, timeout=120)

    def start(self) -> PrivatePostgres:
        options = f"-p {self.port} -k {self.dir} -c listen_addresses=127.0.0.1 -c fsync=off"
        self._run("pg_ctl", "-D", str(self.data), "-o", options, "-l", str(self.dir / "log"), "-w", "start")
        return self

    def stop(self) -> None:
        self._run("pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "stop")

    def remove(self) -> None:
        with contextlib.suppress(subprocess.CalledProcessError):
            self.stop()
        shutil.rmtree(self.dir, ignore_errors=True)


class SteadyPublisher:
    """Publishes JSON readings {"v": k, "seq": k}, k = 1..total, at a steady rate with QoS 1 (paho, threaded)."""

    def __init__(
        self, port: int, topic: str, total: int, *, rate: float, value: Callable[[int], float] | None = None
    ) -> None:
        import paho.mqtt.client as mqtt  # noqa: PLC0415 - only these tests publish from Python

        self.topic, self.total, self.rate = topic, total, rate
        self.value = value or float
        self.sent = 0
        self._stop = threading.Event()
        self._client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=unique("sender-"))
        self._client.connect("127.0.0.1", port)
        self._client.loop_start()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def start(self) -> SteadyPublisher:
        self._thread.start()
        return self

    def _run(self) -> None:
        started = time.monotonic()
        for k in range(1, self.total + 1):
            if self._stop.is_set():
                return
            pause = started + k / self.rate - time.monotonic()
            if pause > 0:
                time.sleep(pause)
            info = self._client.publish(self.topic, json.dumps({"v": self.value(k), "seq": k}), qos=1)
            info.wait_for_publish(timeout=30)
            self.sent = k

    def join(self, timeout: float) -> None:
        self._thread.join(timeout=timeout)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=10)
        self._client.loop_stop()
        self._client.disconnect()


FIGURES = Path(__file__).resolve().parents[2] / "var" / "reliability" / "figures.jsonl"


def record_figures(scenario: str, **figures: object) -> None:
    """Append the figures a fault test measured, for scripts/reliability_report."""
    FIGURES.parent.mkdir(parents=True, exist_ok=True)
    line = {"scenario": scenario, "at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), **figures}
    with FIGURES.open("a") as handle:
        handle.write(json.dumps(line) + "\n")
