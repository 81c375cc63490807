"""Helpers shared by the operations tests: paths, free ports, HTTP, a Mosquitto of the test's own."""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from ruamel.yaml import YAML

from monitor.config import load_config_text

REPO = Path(__file__).resolve().parents[2]
DEPLOY = REPO / "deploy"
YAMLLINT_CONFIG = "{extends: default, rules: {line-length: {max: 110}, document-start: disable}}"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on now."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@dataclass(frozen=True)
class Answer:
    status: int
    content_type: str
    body: bytes


def http_get(url: str, *, accept: str | None = None, method: str = "GET") -> Answer:
    """One HTTP request with urllib; error statuses are answers too."""
    if not url.startswith("http://"):
        raise ValueError(f"only plain HTTP URLs are probed here, got {url!r}")
    request = urllib.request.Request(url, method=method)  # noqa: S310 - checked to be http:// above
    if accept:
        request.add_header("Accept", accept)
    try:
        with urllib.request.urlopen(request, timeout=30) as response:  # noqa: S310 - http:// only
            return Answer(response.status, response.headers.get("Content-Type", ""), response.read())
    except urllib.error.HTTPError as error:
        with error:
            return Answer(error.code, error.headers.get("Content-Type", ""), error.read())


def settings(conf_text: str) -> dict[str, str]:
    """The ``option value`` lines of a Mosquitto configuration (last one wins, as in Mosquitto)."""
    found: dict[str, str] = {}
    for line in conf_text.splitlines():
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            key, _, value = stripped.partition(" ")
            found[key] = value.strip()
    return found


@contextlib.contextmanager
def running_mosquitto(main_conf: Path, port: int) -> Iterator[subprocess.Popen[bytes]]:
    """Run the real Mosquitto with ``main_conf`` until the block ends; fail with its log if it does not start."""
    binary = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    log = main_conf.with_suffix(".log")
    with log.open("wb") as sink:
        process = subprocess.Popen([binary, "-c", str(main_conf)], stdout=sink, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 20
        while True:
            if process.poll() is not None:
                raise AssertionError(f"mosquitto exited with {process.returncode}:\n{log.read_text()}")
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.5):
                    break
            except OSError:
                if time.monotonic() > deadline:
                    raise AssertionError(f"mosquitto did not listen on {port}:\n{log.read_text()}") from None
                time.sleep(0.05)
        yield process
    finally:
        process.terminate()
        process.wait(timeout=20)


def keep_root_user() -> str:
    """Run as root, Mosquitto switches to its own user, which cannot read the test's files."""
    return "user root\n" if os.geteuid() == 0 else ""


def plant_config(text: str, source: str) -> dict[str, object]:
    """Parse a plant configuration and validate it with the daemon's own loader."""
    document = YAML(typ="safe").load(text)
    assert isinstance(document, dict), source
    load_config_text(text, source)
    return document
