"""The live demo: a broker, the daemon, the invented tile plant publishing, alerts printed.

Run through ``scripts/demo``. Uses the broker on 127.0.0.1:1883 when one answers; otherwise
starts Mosquitto (when installed) or an in-process broker, bound to 127.0.0.1 only, and says so.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import paho.mqtt.client as mqtt

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "demo.yaml"
HOST, PORT = "127.0.0.1", 1883
ALERTS = "brightwater/monitor/alerts/#"


def broker_answers(host: str, port: int) -> bool:
    with contextlib.suppress(OSError), socket.create_connection((host, port), timeout=1.0):
        return True
    return False


def start_broker(workdir: Path) -> subprocess.Popen[bytes] | threading.Thread | None:
    """Start a broker on 127.0.0.1:1883 for the demo; None if one already answers."""
    if broker_answers(HOST, PORT):
        print(f"using the MQTT broker already answering on {HOST}:{PORT}")
        return None
    mosquitto = shutil.which("mosquitto") or (
        "/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None
    )
    if mosquitto:
        conf = workdir / "mosquitto.conf"
        conf.write_text(
            f"listener {PORT} {HOST}\nallow_anonymous true\npersistence false\nset_tcp_nodelay true\n"
            "max_queued_messages 100000\n"
        )
        process = subprocess.Popen(
            [mosquitto, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        print(f"no broker answered on {HOST}:{PORT}; started Mosquitto bound to {HOST} for the demo")
    else:
        try:
            from amqtt.broker import Broker  # noqa: PLC0415 - the optional [demo] extra
        except ImportError:
            sys.exit(
                "no MQTT broker answers on 127.0.0.1:1883 and none is installed: "
                "install mosquitto or `pip install .[demo]`"
            )

        def serve() -> None:
            async def main() -> None:
                broker = Broker({"listeners": {"default": {"type": "tcp", "bind": f"{HOST}:{PORT}"}}})
                await broker.start()
                await asyncio.Event().wait()

            asyncio.run(main())

        process = threading.Thread(target=serve, daemon=True, name="demo-broker")
        process.start()
        print(
            f"no broker answered on {HOST}:{PORT}; started an in-process broker bound to {HOST} for the demo"
        )
    for _ in range(50):
        if broker_answers(HOST, PORT):
            return process
        time.sleep(0.1)
    sys.exit("the demo broker did not start")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--seconds", type=float, default=75.0, help="how long the plant publishes")
    parser.add_argument("--speed", type=float, default=30.0, help="plant seconds per real second")
    args = parser.parse_args()
    workdir = ROOT / "var" / "demo"
    workdir.mkdir(parents=True, exist_ok=True)
    broker = start_broker(workdir)

    received: Counter[str] = Counter()

    def on_message(_client: mqtt.Client, _userdata: object, message: mqtt.MQTTMessage) -> None:
        event = json.loads(message.payload)
        data = event.get("data", {})
        received[str(data.get("chart"))] += 1
        stamp = time.strftime("%H:%M:%S")
        print(f"{stamp}  {str(data.get('severity', '')).upper():8s} {data.get('message')}")
        if data.get("hint"):
            print(f"          hint: {data['hint']}")

    watcher = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="brightwater-demo-watcher")
    watcher.on_message = on_message
    watcher.connect(HOST, PORT)
    watcher.subscribe(ALERTS, qos=1)
    watcher.loop_start()

    daemon = subprocess.Popen(
        [str(ROOT / ".venv" / "bin" / "monitor"), "run", "--config", str(CONFIG), "--log-level", "warning"],
        stdout=(workdir / "daemon.log").open("wb"),
    )
    time.sleep(3)  # the daemon prints what it subscribed to and where it stores
    if daemon.poll() is not None:
        sys.exit(f"the daemon stopped at once; see {workdir / 'daemon.log'}")
    print(
        f"\nthe plant publishes for {args.seconds:g} s at {args.speed:g}x; alerts appear below as they arrive"
    )
    print("(advisory only: statistical evidence for people, never an interlock)\n")
    simulator = subprocess.Popen(
        [
            sys.executable,
            str(ROOT / "scripts" / "plant_simulator.py"),
            "--publish",
            f"{HOST}:{PORT}",
            "--speed",
            str(args.speed),
            "--seconds",
            str(args.seconds),
        ],
        stdout=subprocess.PIPE,
    )
    try:
        simulator.wait()
        time.sleep(3)
    except KeyboardInterrupt:
        simulator.terminate()
    daemon.send_signal(signal.SIGTERM)
    with contextlib.suppress(subprocess.TimeoutExpired):
        daemon.wait(timeout=30)
    watcher.loop_stop()
    watcher.disconnect()
    if isinstance(broker, subprocess.Popen):
        broker.terminate()
    print("\nalerts received per chart:")
    for chart, count in sorted(received.items()):
        print(f"  {count:4d}  {chart}")
    print(f"\ndaemon log: {workdir / 'daemon.log'}; storage: {ROOT / 'config' / 'monitor.db'}")
    print("replay the same plant offline: scripts/demo --offline")


if __name__ == "__main__":
    os.chdir(ROOT)
    main()
