"""The reference consumer: a bare aiomqtt client that only counts messages.

Same connection settings as the daemon's link (MQTT 3.1.1, persistent session, QoS 1,
manual acknowledgement through the paho client, TCP_NODELAY), and nothing else: every message
is acknowledged as soon as it arrives. Prints "ready" once subscribed, then one JSON line:
{"first": t, "last": t, "count": n, "cpu": s} (wall-clock seconds of the first and the n-th
message, CPU seconds used meanwhile).

Usage: bare_client.py PORT TOPIC COUNT CLIENT_ID
"""

from __future__ import annotations

import asyncio
import json
import resource
import socket
import sys
import time

import aiomqtt


async def main(port: int, topic: str, count: int, client_id: str) -> None:
    client = aiomqtt.Client(
        "127.0.0.1",
        port,
        identifier=client_id,
        clean_session=False,
        socket_options=((socket.IPPROTO_TCP, socket.TCP_NODELAY, 1),),
    )
    async with client:
        paho = client._client
        paho.manual_ack_set(on=True)
        await client.subscribe(topic, qos=1)
        print("ready", flush=True)
        usage = resource.getrusage(resource.RUSAGE_SELF)
        cpu_before = usage.ru_utime + usage.ru_stime
        seen = 0
        first = 0.0
        async for message in client.messages:
            if seen == 0:
                first = time.time()
            seen += 1
            paho.ack(message.mid, message.qos)
            if seen >= count:
                break
        last = time.time()
        usage = resource.getrusage(resource.RUSAGE_SELF)
        cpu = usage.ru_utime + usage.ru_stime - cpu_before
    # leave no persistent session behind on the broker
    async with aiomqtt.Client("127.0.0.1", port, identifier=client_id, clean_session=True):
        pass
    print(json.dumps({"first": first, "last": last, "count": seen, "cpu": cpu}), flush=True)


if __name__ == "__main__":
    asyncio.run(main(int(sys.argv[1]), sys.argv[2], int(sys.argv[3]), sys.argv[4]))
