"""The systemd unit, checked by systemd's own analyser."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

from monitor.daemon import STOP_GRACE
from tests.ops.tools import DEPLOY

UNIT = DEPLOY / "line-monitor.service"
MAX_EXPOSURE = 1.5
"""The highest `systemd-analyze security` exposure accepted (0 best, 10 worst; systemd calls < 2 "OK")."""


def analyze(*args: str) -> subprocess.CompletedProcess[str]:
    binary = shutil.which("systemd-analyze")
    assert binary is not None, "systemd-analyze is missing: apt-get install systemd"
    return subprocess.run([binary, *args], capture_output=True, text=True, timeout=120, check=False)


def unit_lines(text: str) -> list[tuple[str, str, str]]:
    """(section, key, value) for every assignment, in order (keys may repeat, as systemd allows)."""
    section = ""
    found = []
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            section = line.strip("[]")
            continue
        key, _, value = line.partition("=")
        found.append((section, key, value))
    return found


def values(key: str) -> list[str]:
    return [v for s, k, v in unit_lines(UNIT.read_text()) if k == key]


@pytest.fixture
def root(tmp_path: Path) -> Path:
    """A file-system root with the system's units and the executable the unit starts."""
    units = Path("/usr/lib/systemd/system")
    assert units.is_dir(), "systemd's unit directory is missing: apt-get install systemd"
    shutil.copytree(units, tmp_path / "usr/lib/systemd/system", symlinks=True)
    executable = tmp_path / "opt/line-monitor/bin/monitor"
    executable.parent.mkdir(parents=True)
    executable.write_text("#!/bin/sh\n")
    executable.chmod(0o755)
    installed = tmp_path / "etc/systemd/system/line-monitor.service"
    installed.parent.mkdir(parents=True)
    shutil.copy(UNIT, installed)
    return tmp_path


def test_systemd_analyze_verify_accepts_the_unit_without_a_warning(root: Path):
    """`systemd-analyze verify` exits 0 and prints nothing: no unknown key, no bad value, executable found."""
    done = analyze("verify", "--man=no", f"--root={root}", "line-monitor.service")
    assert done.returncode == 0, done.stderr
    assert done.stderr.strip() == ""


def test_verify_fails_when_the_executable_is_missing(root: Path):
    """The same check fails once the ExecStart program is gone, so the test above can fail."""
    (root / "opt/line-monitor/bin/monitor").unlink()
    done = analyze("verify", "--man=no", f"--root={root}", "line-monitor.service")
    assert done.returncode != 0
    assert "/opt/line-monitor/bin/monitor" in done.stderr


def test_the_security_exposure_is_at_most_the_stated_level():
    """`systemd-analyze security --offline=yes` rates the unit at or below MAX_EXPOSURE (and --threshold agrees)."""
    done = analyze("security", "--offline=yes", str(UNIT))
    assert done.returncode == 0, done.stderr
    match = re.search(r"Overall exposure level for line-monitor\.service: ([0-9.]+)", done.stdout)
    assert match is not None, done.stdout
    assert float(match.group(1)) <= MAX_EXPOSURE
    strict = analyze("security", "--offline=yes", f"--threshold={round(MAX_EXPOSURE * 10)}", str(UNIT))
    assert strict.returncode == 0, strict.stdout


def test_the_unit_runs_the_daemon_as_a_notify_service_with_a_watchdog():
    """Type=notify, a WatchdogSec, Restart=on-failure and the documented ExecStart."""
    assert values("Type") == ["notify"]
    assert values("NotifyAccess") == ["main"]
    assert values("WatchdogSec") == ["30"]
    assert values("Restart") == ["on-failure"]
    assert values("ExecStart") == ["/opt/line-monitor/bin/monitor run --config /etc/line-monitor/plant.yaml"]


def test_the_unit_has_a_dynamic_user_a_read_only_system_and_its_own_directories():
    """DynamicUser, ProtectSystem=strict, State- and ConfigurationDirectory named line-monitor."""
    assert values("DynamicUser") == ["yes"]
    assert values("ProtectSystem") == ["strict"]
    assert values("StateDirectory") == ["line-monitor"]
    assert values("ConfigurationDirectory") == ["line-monitor"]
    assert "/etc/line-monitor/plant.yaml" in values("ExecStart")[0]


def test_the_broker_password_comes_as_a_credential_named_like_the_password_file():
    """LoadCredential hands over broker_password, the file name the configuration gives as password_file."""
    (credential,) = values("LoadCredential")
    name, _, source = credential.partition(":")
    assert name == "broker_password"
    assert source.startswith("/etc/line-monitor/")


def test_the_stop_timeout_covers_the_daemons_own_stop_grace():
    """TimeoutStopSec leaves room for the daemon's store grace (STOP_GRACE) plus 5 s of publishing."""
    (timeout,) = values("TimeoutStopSec")
    assert int(timeout) >= STOP_GRACE + 5
