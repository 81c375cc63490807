"""The MQTT link: the only module that imports aiomqtt.

One persistent-session client (MQTT 3.1.1, ``clean_session=False``, a fixed client id) that
subscribes at QoS 1, reconnects with capped exponential backoff after any broker loss, and
acknowledges a message only when told to (after what it carried is committed). aiomqtt 2.x
acknowledges on receipt; manual acknowledgement goes through its paho client, so that detail
lives here and nowhere else.

Messages keep arriving through :meth:`MqttLink.messages` across reconnects. A message received
on an earlier connection can no longer be acknowledged (the broker re-sends it on the new
connection instead), so :meth:`MqttLink.ack` ignores such stale messages; de-duplication
downstream recognises the re-sent copy.
"""

from __future__ import annotations

import asyncio
import contextlib
import random
import socket
import ssl
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import aiomqtt

from monitor.logs import get_logger

__all__ = ["BrokerSettings", "Incoming", "LinkStats", "MqttLink", "TlsSettings"]

_log = get_logger(component="mqtt")


@dataclass(frozen=True, slots=True)
class TlsSettings:
    """TLS to the broker: a CA bundle, and optionally a client certificate and key."""

    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    verify_hostname: bool = True


@dataclass(frozen=True, slots=True)
class BrokerSettings:
    """How to reach the broker. The password is a value here, never logged or stored."""

    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = "line-monitor"
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    tls: TlsSettings | None = None
    qos: int = 1
    persistent_session: bool = True
    keepalive: int = 30
    reconnect_initial: float = 0.5
    reconnect_max: float = 30.0
    connect_timeout: float = 10.0

    def describe(self) -> str:
        """Where the link connects, for logs (no secrets)."""
        scheme = "mqtts" if self.tls else "mqtt"
        user = f"{self.username}@" if self.username else ""
        return f"{scheme}://{user}{self.host}:{self.port} as {self.client_id}"


@dataclass(frozen=True, slots=True)
class Incoming:
    """One received message, tagged with the connection it came on."""

    topic: str
    payload: bytes
    mid: int
    qos: int
    retain: bool
    received_at: float
    generation: int


@dataclass(slots=True)
class LinkStats:
    """Counters of the link, for health and metrics."""

    connects: int = 0
    disconnects: int = 0
    received: int = 0
    acked: int = 0
    stale_acks: int = 0
    published: int = 0


def _tls_context(tls: TlsSettings) -> ssl.SSLContext:
    context = ssl.create_default_context(cafile=tls.ca_file)
    if tls.cert_file:
        context.load_cert_chain(tls.cert_file, tls.key_file)
    if not tls.verify_hostname:
        context.check_hostname = False
    return context


class MqttLink:
    """A reconnecting, manually acknowledging MQTT 3.1.1 client.

    Args:
        settings: broker address, identity and credentials.
        subscriptions: topic filters to subscribe to (again on every reconnect).
        will: topic and payload of the retained message the broker publishes if we vanish.
        online: retained payload published to the will topic after each connect.
        queue_size: most received messages held before reading from the broker pauses.
    """

    def __init__(
        self,
        settings: BrokerSettings,
        subscriptions: Sequence[str],
        *,
        will: tuple[str, bytes] | None = None,
        online: bytes | None = None,
        queue_size: int = 10_000,
        forget: Sequence[str] = (),
    ) -> None:
        self.settings = settings
        self.subscriptions = list(dict.fromkeys(subscriptions))
        self._forget = [f for f in dict.fromkeys(forget) if f not in self.subscriptions]
        self.stats = LinkStats()
        self._will = will
        self._online = online
        self._queue: asyncio.Queue[Incoming | None] = asyncio.Queue(maxsize=queue_size)
        self._client: aiomqtt.Client | None = None
        self._generation = 0
        self._connected = asyncio.Event()
        self._stopping = False
        self._on_connect: list[Callable[[], None]] = []

    @property
    def connected(self) -> bool:
        """Whether the link is connected and subscribed now."""
        return self._connected.is_set()

    def _stop_requested(self) -> bool:
        return self._stopping

    @property
    def queued(self) -> int:
        """Messages received and not yet taken by the processor."""
        return self._queue.qsize()

    def on_connect(self, callback: Callable[[], None]) -> None:
        """Call ``callback`` after every successful (re)connect and subscribe."""
        self._on_connect.append(callback)

    async def wait_connected(self) -> None:
        """Wait until connected (bound it with ``asyncio.timeout``)."""
        await self._connected.wait()

    def _make_client(self, tls_context: ssl.SSLContext | None) -> aiomqtt.Client:
        s = self.settings
        will = None
        if self._will is not None:
            will = aiomqtt.Will(self._will[0], self._will[1], qos=1, retain=True)
        return aiomqtt.Client(
            s.host,
            s.port,
            username=s.username,
            password=s.password,
            identifier=s.client_id,
            clean_session=not s.persistent_session,
            keepalive=s.keepalive,
            timeout=s.connect_timeout,
            will=will,
            tls_context=tls_context,
            # Without TCP_NODELAY each QoS 1 round trip waits for delayed acknowledgements.
            socket_options=((socket.IPPROTO_TCP, socket.TCP_NODELAY, 1),),
        )

    async def run(self) -> None:
        """Connect, subscribe and receive until :meth:`stop`; reconnect after every loss."""
        s = self.settings
        tls_context = await asyncio.to_thread(_tls_context, s.tls) if s.tls else None
        delay = s.reconnect_initial
        while not self._stop_requested():
            client = self._make_client(tls_context)
            try:
                async with client:
                    client._client.manual_ack_set(on=True)
                    for topic_filter in self.subscriptions:
                        await client.subscribe(topic_filter, qos=s.qos)
                    # a persistent session keeps filters of an earlier configuration: drop them
                    for topic_filter in self._forget:
                        await client.unsubscribe(topic_filter)
                    self._forget = []
                    self._generation += 1
                    self._client = client
                    self.stats.connects += 1
                    if self._will is not None and self._online is not None:
                        await client.publish(self._will[0], self._online, qos=1, retain=True)
                    self._connected.set()
                    _log.info("mqtt_connected", broker=s.describe(), subscriptions=self.subscriptions)
                    for callback in self._on_connect:
                        callback()
                    delay = s.reconnect_initial
                    generation = self._generation
                    queue = self._queue
                    async for message in client.messages:
                        payload = message.payload
                        self.stats.received += 1
                        incoming = Incoming(
                            message.topic.value,
                            payload if type(payload) is bytes else bytes(payload),
                            message.mid,
                            message.qos,
                            message.retain,
                            time.time(),
                            generation,
                        )
                        if queue.full():  # the processor is behind: stop reading from the broker
                            await queue.put(incoming)
                        else:
                            queue.put_nowait(incoming)
            except aiomqtt.MqttError as exc:
                if self._stop_requested():
                    break
                was_connected = self._connected.is_set()
                self._connected.clear()
                self._client = None
                if was_connected:
                    self.stats.disconnects += 1
                    _log.warning("mqtt_connection_lost", broker=s.describe(), error=str(exc))
                else:
                    _log.warning(
                        "mqtt_connect_failed", broker=s.describe(), error=str(exc), retry_in=round(delay, 2)
                    )
                await asyncio.sleep(delay * random.uniform(0.8, 1.2))
                delay = min(delay * 2.0, s.reconnect_max)
            finally:
                self._connected.clear()
                self._client = None

    async def update_subscriptions(self, subscriptions: Sequence[str]) -> None:
        """Subscribe to new filters and drop old ones, now and on every later reconnect."""
        wanted = list(dict.fromkeys(subscriptions))
        added = [f for f in wanted if f not in self.subscriptions]
        dropped = [f for f in self.subscriptions if f not in wanted]
        self.subscriptions = wanted
        client = self._client
        if client is None:
            self._forget = [*self._forget, *dropped]
            return
        try:
            for topic_filter in added:
                await client.subscribe(topic_filter, qos=self.settings.qos)
            for topic_filter in dropped:
                await client.unsubscribe(topic_filter)
        except aiomqtt.MqttError:
            self._forget = [*self._forget, *dropped]  # the next connect applies both lists

    def stop(self) -> None:
        """Make :meth:`run` end at its next reconnect attempt (cancel its task to end it now)."""
        self._stopping = True

    def take_ready(self, limit: int) -> list[Incoming]:
        """Up to ``limit`` messages that are already waiting, without waiting."""
        out: list[Incoming] = []
        while len(out) < limit:
            try:
                item = self._queue.get_nowait()
            except asyncio.QueueEmpty:
                break
            if item is not None:
                out.append(item)
        return out

    async def next_message(self) -> Incoming | None:
        """Wait for the next message; None if :meth:`wake` came first."""
        return await self._queue.get()

    def wake(self) -> None:
        """Make a waiting :meth:`next_message` return None now (nothing to do if messages wait).

        One timer calling this replaces a timeout around every wait (4 us each).
        """
        with contextlib.suppress(asyncio.QueueFull):
            self._queue.put_nowait(None)

    def ack(self, message: Incoming) -> bool:
        """Acknowledge a message whose content is committed; False if its connection is gone."""
        client = self._client
        if message.qos == 0:
            return True
        if client is None or message.generation != self._generation:
            self.stats.stale_acks += 1
            return False
        client._client.ack(message.mid, message.qos)
        self.stats.acked += 1
        return True

    async def publish(
        self, topic: str, payload: bytes, *, qos: int = 1, retain: bool = False, ack_within: float = 10.0
    ) -> None:
        """Publish and, at QoS 1, wait for the broker's acknowledgement.

        Raises:
            aiomqtt.MqttError: not connected, or no acknowledgement within ``ack_within`` seconds.
        """
        client = self._client
        if client is None:
            raise aiomqtt.MqttError("not connected")
        await client.publish(topic, payload, qos=qos, retain=retain, timeout=ack_within)
        self.stats.published += 1


PublishError = aiomqtt.MqttError
"""The error :meth:`MqttLink.publish` raises when the broker is unreachable."""
