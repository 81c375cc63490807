"""Background load: JSON readings on standard output at a steady rate, for ``mosquitto_pub -l``.

Lines {"v": value, "ts": now, "seq": k} in-control (mean 8, sd 0.04), written in ticks of 5 ms
(so the rate is steady at that granularity) until SECONDS have passed
or SIGTERM comes; then prints the number of lines written to standard error.

Usage: steady_load.py RATE SECONDS
"""

from __future__ import annotations

import contextlib
import random
import signal
import sys
import time

TICK = 0.005


STOP = []


def main(rate: float, seconds: float) -> None:
    signal.signal(signal.SIGTERM, lambda *_: STOP.append(True))
    out = sys.stdout
    started = time.monotonic()
    sent = 0
    sequence = 0
    rng = random.Random(3)
    while True:
        elapsed = time.monotonic() - started
        if elapsed >= seconds or STOP:
            break
        due = int(elapsed * rate)
        now = time.time()
        lines = []
        while sent < due:
            sequence += 1
            sent += 1
            lines.append(f'{{"v": {rng.gauss(8.0, 0.04):.4f}, "ts": {now:.3f}, "seq": {sequence}}}\n')
        if lines:
            out.write("".join(lines))
            out.flush()
        time.sleep(TICK)
    print(sent, file=sys.stderr, flush=True)


if __name__ == "__main__":
    with contextlib.suppress(BrokenPipeError):
        main(float(sys.argv[1]), float(sys.argv[2]))
