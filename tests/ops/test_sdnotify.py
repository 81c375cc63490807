"""systemd notifications into real AF_UNIX datagram sockets (a path and an abstract address)."""

from __future__ import annotations

import asyncio
import os
import shutil
import socket
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from monitor import sdnotify
from monitor.sdnotify import Watchdog, notify, watchdog_interval


@dataclass
class Listener:
    """A bound datagram socket standing where systemd's notification socket would be."""

    sock: socket.socket
    address: str  # as written in NOTIFY_SOCKET

    def receive(self) -> str:
        self.sock.settimeout(30)
        return self.sock.recv(4096).decode()

    def nothing_waiting(self) -> bool:
        self.sock.setblocking(False)
        try:
            self.sock.recv(4096)
        except BlockingIOError:
            return True
        finally:
            self.sock.setblocking(True)
        return False


@pytest.fixture
def path_listener() -> Iterator[Listener]:
    # a short directory: AF_UNIX paths are limited to 107 bytes
    directory = tempfile.mkdtemp(prefix="sdn-", dir="/tmp")
    path = str(Path(directory) / "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    try:
        yield Listener(sock, path)
    finally:
        sock.close()
        shutil.rmtree(directory)


@pytest.fixture
def abstract_listener() -> Iterator[Listener]:
    name = f"line-monitor-test-{uuid.uuid4().hex}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind("\0" + name)
    try:
        yield Listener(sock, "@" + name)
    finally:
        sock.close()


def test_notify_sends_the_state_to_a_socket_path(path_listener: Listener):
    """READY=1 arrives as one datagram on the socket named by NOTIFY_SOCKET."""
    assert notify("READY=1", environ={"NOTIFY_SOCKET": path_listener.address}) is True
    assert path_listener.receive() == "READY=1"


def test_notify_reaches_an_abstract_socket_written_with_an_at_sign(abstract_listener: Listener):
    """An '@' address means the abstract namespace (a leading NUL byte)."""
    assert notify("STATUS=hello", environ={"NOTIFY_SOCKET": abstract_listener.address}) is True
    assert abstract_listener.receive() == "STATUS=hello"


def test_notify_reads_the_process_environment_by_default(
    path_listener: Listener, monkeypatch: pytest.MonkeyPatch
):
    """Without environ, NOTIFY_SOCKET comes from os.environ."""
    monkeypatch.setenv("NOTIFY_SOCKET", path_listener.address)
    assert sdnotify.stopping() is True
    assert path_listener.receive() == "STOPPING=1"


@pytest.mark.parametrize("address", [None, "", "relative/notify", "vsock:2:1234", "@"])
def test_notify_does_nothing_without_a_usable_socket(address: str | None):
    """Outside systemd (no NOTIFY_SOCKET) or with an address it cannot use, notify returns False."""
    environ = {} if address is None else {"NOTIFY_SOCKET": address}
    assert notify("READY=1", environ=environ) is False


def test_notify_returns_false_when_nobody_listens():
    """A socket path that does not exist gives False, not an exception."""
    directory = tempfile.mkdtemp(prefix="sdn-", dir="/tmp")
    try:
        assert notify("READY=1", environ={"NOTIFY_SOCKET": str(Path(directory) / "gone")}) is False
    finally:
        shutil.rmtree(directory)


def test_ready_carries_a_single_line_status(path_listener: Listener):
    """ready(status) sends READY=1 and a STATUS line with newlines folded into spaces."""
    env = {"NOTIFY_SOCKET": path_listener.address}
    assert sdnotify.ready("connected to broker\n12 charts", environ=env) is True
    assert path_listener.receive() == "READY=1\nSTATUS=connected to broker 12 charts"


def test_status_stopping_and_extend_timeout_send_their_assignments(path_listener: Listener):
    """STATUS=, STOPPING=1 with a status, and EXTEND_TIMEOUT_USEC in microseconds."""
    env = {"NOTIFY_SOCKET": path_listener.address}
    sdnotify.status("migrating the database", environ=env)
    sdnotify.stopping("committing", environ=env)
    sdnotify.extend_timeout(90, environ=env)
    assert path_listener.receive() == "STATUS=migrating the database"
    assert path_listener.receive() == "STOPPING=1\nSTATUS=committing"
    assert path_listener.receive() == "EXTEND_TIMEOUT_USEC=90000000"


@pytest.mark.parametrize(
    ("environ", "expected"),
    [
        ({}, None),
        ({"WATCHDOG_USEC": "30000000"}, 30.0),
        ({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "4242"}, 30.0),
        ({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "4243"}, None),
        ({"WATCHDOG_USEC": "0"}, None),
        ({"WATCHDOG_USEC": "soon"}, None),
        ({"WATCHDOG_USEC": "-5"}, None),
    ],
)
def test_the_watchdog_interval_follows_watchdog_usec_and_watchdog_pid(
    environ: dict[str, str], expected: float | None
):
    """The watchdog is on for this process only when WATCHDOG_USEC is positive and WATCHDOG_PID is ours or unset."""
    assert watchdog_interval(environ, pid=4242) == expected


def test_the_watchdog_pings_only_while_progress_is_made(path_listener: Listener):
    """step() sends WATCHDOG=1 while progressing() is true and withholds it while false."""
    progressing = [True]
    watchdog = Watchdog(
        lambda: progressing[0],
        environ={"NOTIFY_SOCKET": path_listener.address, "WATCHDOG_USEC": "10000000"},
    )
    assert watchdog.enabled
    assert watchdog.period == 5.0
    assert watchdog.step() is True
    assert path_listener.receive() == "WATCHDOG=1"
    progressing[0] = False
    assert watchdog.step() is False
    assert path_listener.nothing_waiting()
    progressing[0] = True
    assert watchdog.step() is True
    assert path_listener.receive() == "WATCHDOG=1"
    assert (watchdog.pings, watchdog.withheld) == (2, 1)


def test_the_watchdog_is_off_for_another_process(path_listener: Listener):
    """With WATCHDOG_PID naming another process, the watchdog is off and sends nothing."""
    watchdog = Watchdog(
        lambda: True,
        environ={
            "NOTIFY_SOCKET": path_listener.address,
            "WATCHDOG_USEC": "10000000",
            "WATCHDOG_PID": str(os.getpid() + 1),
        },
    )
    assert not watchdog.enabled
    assert watchdog.step() is False
    assert path_listener.nothing_waiting()


async def test_the_watchdog_task_keeps_pinging_until_cancelled(abstract_listener: Listener):
    """run() pings every half interval; cancelling it stops the pings."""
    watchdog = Watchdog(
        lambda: True,
        environ={"NOTIFY_SOCKET": abstract_listener.address, "WATCHDOG_USEC": "20000"},
    )
    task = asyncio.create_task(watchdog.run())
    try:
        received = [await asyncio.to_thread(abstract_listener.receive) for _ in range(3)]
    finally:
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
    assert received == ["WATCHDOG=1"] * 3


async def test_the_watchdog_task_returns_at_once_without_a_watchdog():
    """Without WATCHDOG_USEC, run() returns instead of looping."""
    await Watchdog(lambda: True, environ={}).run()


def test_a_path_socket_file_stays_where_it_was(path_listener: Listener):
    """Notifying does not remove or replace the socket file (systemd owns it)."""
    notify("READY=1", environ={"NOTIFY_SOCKET": path_listener.address})
    assert Path(path_listener.address).is_socket()
