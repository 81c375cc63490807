"""systemd service notifications (sd_notify) without dependencies.

Under ``Type=notify`` systemd passes ``$NOTIFY_SOCKET``, an AF_UNIX datagram socket (a path, or
an abstract address written with a leading ``@``). The daemon sends ``READY=1`` once it is
connected, subscribed and has its database, ``STATUS=...`` lines for ``systemctl status``,
``STOPPING=1`` when it begins a clean stop, and, when the unit sets ``WatchdogSec=``,
``WATCHDOG=1`` at half that interval while its processing loop makes progress (:class:`Watchdog`).
Outside systemd every call does nothing and returns False.

Examples:
    >>> notify("READY=1", environ={})
    False
    >>> watchdog_interval({"WATCHDOG_USEC": "30000000"}, pid=1)
    30.0
"""

from __future__ import annotations

import asyncio
import os
import socket
from collections.abc import Callable, Mapping

__all__ = [
    "Watchdog",
    "extend_timeout",
    "notify",
    "ready",
    "status",
    "stopping",
    "watchdog_interval",
]


def _socket_address(environ: Mapping[str, str]) -> str | None:
    address = environ.get("NOTIFY_SOCKET", "")
    if address.startswith("@") and len(address) > 1:
        return "\0" + address[1:]
    if address.startswith("/"):
        return address
    return None  # unset, or a kind of address this module does not speak (vsock:)


def notify(state: str, *, environ: Mapping[str, str] | None = None) -> bool:
    """Send ``state`` (newline-separated ``KEY=value`` assignments) to the service manager.

    Returns True when the datagram was sent, False when there is no ``$NOTIFY_SOCKET`` or the
    socket refused it. Never raises: notifications are a courtesy to the service manager.
    """
    address = _socket_address(os.environ if environ is None else environ)
    if address is None:
        return False
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
            sock.connect(address)
            sock.sendall(state.encode("utf-8"))
    except OSError:
        return False
    return True


def _one_line(text: str) -> str:
    return " ".join(text.split())


def ready(status_text: str | None = None, *, environ: Mapping[str, str] | None = None) -> bool:
    """Tell systemd the service is up (``READY=1``), with an optional status line."""
    state = "READY=1" if status_text is None else f"READY=1\nSTATUS={_one_line(status_text)}"
    return notify(state, environ=environ)


def status(text: str, *, environ: Mapping[str, str] | None = None) -> bool:
    """Set the one-line status that ``systemctl status`` shows."""
    return notify(f"STATUS={_one_line(text)}", environ=environ)


def stopping(status_text: str | None = None, *, environ: Mapping[str, str] | None = None) -> bool:
    """Tell systemd a clean stop has begun (``STOPPING=1``)."""
    state = "STOPPING=1" if status_text is None else f"STOPPING=1\nSTATUS={_one_line(status_text)}"
    return notify(state, environ=environ)


def extend_timeout(seconds: float, *, environ: Mapping[str, str] | None = None) -> bool:
    """Ask for ``seconds`` more to finish starting or stopping (``EXTEND_TIMEOUT_USEC``).

    Useful while a long schema migration runs at start.
    """
    return notify(f"EXTEND_TIMEOUT_USEC={max(0, round(seconds * 1_000_000))}", environ=environ)


def watchdog_interval(environ: Mapping[str, str] | None = None, *, pid: int | None = None) -> float | None:
    """The watchdog timeout in seconds that systemd expects pings within, or None when off.

    It is on when ``$WATCHDOG_USEC`` holds a positive whole number of microseconds and
    ``$WATCHDOG_PID`` is unset or names this process (``pid``, by default :func:`os.getpid`).
    """
    env = os.environ if environ is None else environ
    raw = env.get("WATCHDOG_USEC", "").strip()
    if not raw.isascii() or not raw.isdigit() or int(raw) == 0:
        return None
    owner = env.get("WATCHDOG_PID", "").strip()
    if owner:
        me = os.getpid() if pid is None else pid
        if not owner.isascii() or not owner.isdigit() or int(owner) != me:
            return None
    return int(raw) / 1_000_000


class Watchdog:
    """Pings the systemd watchdog, but only while the daemon makes progress.

    Args:
        progressing: says whether the processing loop made progress (or idled with nothing to
            do) recently; for example ``lambda: heartbeat.age() < interval``.
        environ: environment to read ``NOTIFY_SOCKET``, ``WATCHDOG_USEC`` and ``WATCHDOG_PID``
            from (the process environment by default).
        pid: this process's id, compared with ``WATCHDOG_PID``.

    A loop that stops making progress stops the pings, so systemd kills the service after
    ``WatchdogSec`` and ``Restart=on-failure`` starts it again. Run :meth:`run` as a task.
    """

    def __init__(
        self,
        progressing: Callable[[], bool],
        *,
        environ: Mapping[str, str] | None = None,
        pid: int | None = None,
    ) -> None:
        self._progressing = progressing
        self._environ: Mapping[str, str] = dict(os.environ if environ is None else environ)
        self.interval = watchdog_interval(self._environ, pid=pid)
        self.pings = 0
        self.withheld = 0

    @property
    def enabled(self) -> bool:
        """Whether systemd expects watchdog pings from this process."""
        return self.interval is not None

    @property
    def period(self) -> float | None:
        """Seconds between pings: half the watchdog interval, as systemd recommends."""
        return None if self.interval is None else self.interval / 2

    def step(self) -> bool:
        """Ping once if the watchdog is on and the daemon is progressing; True if a ping was sent."""
        if self.interval is None:
            return False
        if not self._progressing():
            self.withheld += 1
            return False
        sent = notify("WATCHDOG=1", environ=self._environ)
        if sent:
            self.pings += 1
        return sent

    async def run(self) -> None:
        """Ping every :attr:`period` seconds until cancelled; return at once if the watchdog is off."""
        period = self.period
        if period is None:
            return
        while True:
            self.step()
            await asyncio.sleep(period)
