"""Publisher for the many-charts benchmark: JSON readings round-robin over many topics, at full speed.

Message k goes to topic TEMPLATE.format(i=k % CHARTS) with {"v": value, "ts": t, "seq": k // CHARTS + 1}
(a sequence per topic), QoS 1, paho with up to 1000 messages in flight. Prints the wall-clock
seconds of its first and last publish as JSON when every message is acknowledged by the broker.

Usage: rr_publisher.py PORT TEMPLATE CHARTS MESSAGES
"""

from __future__ import annotations

import json
import random
import sys
import time
from collections import deque

import paho.mqtt.client as mqtt

WINDOW = 20_000


def main(port: int, template: str, charts: int, messages: int) -> None:
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"rr-{random.getrandbits(32):08x}")
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    rng = random.Random(9)
    topics = [template.format(i=i) for i in range(charts)]
    started = time.time()
    pending: deque[mqtt.MQTTMessageInfo] = deque()
    for k in range(messages):
        body = (
            f'{{"v": {rng.gauss(8.0, 0.04):.4f}, "ts": {started + k * 0.001:.3f}, "seq": {k // charts + 1}}}'
        )
        pending.append(client.publish(topics[k % charts], body, qos=1))
        if len(pending) > WINDOW:  # packet ids are 16 bits: keep fewer than 65535 unacknowledged
            pending.popleft().wait_for_publish(timeout=600)
    while pending:
        pending.popleft().wait_for_publish(timeout=600)
    finished = time.time()
    client.loop_stop()
    client.disconnect()
    print(json.dumps({"started": started, "finished": finished}), flush=True)


if __name__ == "__main__":
    main(int(sys.argv[1]), sys.argv[2], int(sys.argv[3]), int(sys.argv[4]))
