"""The Mosquitto configurations for operators and for Compose, run by the real Mosquitto."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from tests.ops.tools import DEPLOY, REPO, free_port, keep_root_user, running_mosquitto, settings

OPERATOR_CONF = DEPLOY / "mosquitto.conf"
COMPOSE_CONF = DEPLOY / "compose" / "mosquitto.conf"
ACL = DEPLOY / "mosquitto.acl"

README_SETTINGS = {
    "set_tcp_nodelay": "true",
    "max_inflight_messages": "100",
    "max_queued_messages": "1000000",
}


def tool(name: str) -> str:
    found = shutil.which(name)
    assert found is not None, f"{name} is missing: apt-get install mosquitto mosquitto-clients"
    return found


def add_account(passwd: Path, user: str, password: str) -> None:
    args = [tool("mosquitto_passwd"), "-b", str(passwd), user, password]
    if not passwd.exists():
        args.insert(1, "-c")
    subprocess.run(args, check=True, capture_output=True, timeout=60)


def client(kind: str, port: int, user: str, password: str, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [tool(kind), "-h", "127.0.0.1", "-p", str(port), "-u", user, "-P", password, "-q", "1", *args],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )


@pytest.mark.parametrize("conf", [OPERATOR_CONF, COMPOSE_CONF], ids=["operator", "compose"])
def test_the_configuration_has_the_settings_the_readme_names(conf: Path):
    """set_tcp_nodelay, max_inflight_messages and max_queued_messages have the README's values, and persistence is kept."""
    found = settings(conf.read_text())
    for key, expected in README_SETTINGS.items():
        assert found.get(key) == expected, key
    assert found.get("allow_anonymous") == "false"
    readme = (REPO / "README.md").read_text()
    for key, expected in README_SETTINGS.items():
        assert f"{key} {expected}" in readme
    if conf == COMPOSE_CONF:
        assert found.get("persistence") == "true"
        assert found.get("persistence_location") == "/mosquitto/data/"
    else:
        assert "autosave_interval" in found


@pytest.fixture
def operator_broker(tmp_path: Path):
    """The operator drop-in under a Debian-like main configuration, with its ACL and two accounts."""
    port = free_port()
    passwd, acl = tmp_path / "passwd", tmp_path / "line-monitor.acl"
    add_account(passwd, "monitor", "monitor-secret")
    add_account(passwd, "plc-gateway", "gateway-secret")
    shutil.copy(ACL, acl)
    drop_in = (
        OPERATOR_CONF.read_text()
        .replace("/etc/mosquitto/passwd", str(passwd))
        .replace("/etc/mosquitto/line-monitor.acl", str(acl))
        .replace("\nlistener 1883\n", f"\nlistener {port} 127.0.0.1\n")
    )
    assert f"listener {port} 127.0.0.1" in drop_in
    (tmp_path / "conf.d").mkdir()
    (tmp_path / "conf.d" / "line-monitor.conf").write_text(drop_in)
    main = tmp_path / "mosquitto.conf"
    main.write_text(
        f"{keep_root_user()}persistence true\npersistence_location {tmp_path}/\n"
        f"log_dest stderr\ninclude_dir {tmp_path / 'conf.d'}\n"
    )
    with running_mosquitto(main, port):
        yield port


def test_the_operator_drop_in_runs_and_refuses_a_wrong_password(operator_broker: int):
    """Mosquitto starts with the drop-in, accepts the monitor account and refuses a wrong password."""
    ok = client(
        "mosquitto_pub",
        operator_broker,
        "monitor",
        "monitor-secret",
        "-t",
        "plant/monitor/daemon/x",
        "-m",
        "1",
    )
    assert ok.returncode == 0, ok.stderr
    refused = client(
        "mosquitto_pub", operator_broker, "monitor", "wrong", "-t", "plant/monitor/daemon/x", "-m", "1"
    )
    assert refused.returncode != 0
    anonymous = subprocess.run(
        [tool("mosquitto_pub"), "-h", "127.0.0.1", "-p", str(operator_broker), "-t", "plant/x", "-m", "1"],
        capture_output=True,
        timeout=60,
        check=False,
    )
    assert anonymous.returncode != 0


def test_the_example_acl_lets_a_gateway_reading_reach_the_monitor(operator_broker: int):
    """A retained reading the gateway may write under plant/line-1/ is delivered to the monitor's subscription."""
    published = client(
        "mosquitto_pub",
        operator_broker,
        "plc-gateway",
        "gateway-secret",
        "-r",
        "-t",
        "plant/line-1/speed",
        "-m",
        "42",
    )
    assert published.returncode == 0, published.stderr
    received = client(
        "mosquitto_sub",
        operator_broker,
        "monitor",
        "monitor-secret",
        "-t",
        "plant/line-1/#",
        "-C",
        "1",
        "-W",
        "30",
    )
    assert received.returncode == 0, received.stderr
    assert received.stdout.strip() == "42"


def test_the_compose_configuration_runs_under_the_real_broker(tmp_path: Path):
    """deploy/compose/mosquitto.conf (container paths moved to a temporary directory) starts and takes a login."""
    port = free_port()
    (tmp_path / "auth").mkdir()
    (tmp_path / "data").mkdir()
    add_account(tmp_path / "auth" / "passwd", "monitor", "compose-secret")
    text = (
        COMPOSE_CONF.read_text()
        .replace("/mosquitto/", f"{tmp_path}/")
        .replace("\nlistener 1883\n", f"\nlistener {port} 127.0.0.1\n")
    )
    assert "/mosquitto/" not in text
    conf = tmp_path / "mosquitto.conf"
    conf.write_text(keep_root_user() + text)
    with running_mosquitto(conf, port):
        done = client(
            "mosquitto_pub", port, "monitor", "compose-secret", "-t", "plant/monitor/daemon/x", "-m", "1"
        )
        assert done.returncode == 0, done.stderr
