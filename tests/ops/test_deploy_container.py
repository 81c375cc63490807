"""The Containerfile, parsed with dockerfile-parse (no container engine runs here)."""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from dockerfile_parse import DockerfileParser

from monitor.health import HealthServer, Readiness
from tests.ops.tools import DEPLOY, REPO

CONTAINERFILE = DEPLOY / "Containerfile"


def parsed() -> DockerfileParser:
    return DockerfileParser(fileobj=io.BytesIO(CONTAINERFILE.read_bytes()))


def final_stage() -> list[dict[str, str]]:
    """The instructions after the last FROM."""
    structure = [i for i in parsed().structure if i["instruction"] != "COMMENT"]
    last_from = max(n for n, i in enumerate(structure) if i["instruction"] == "FROM")
    return structure[last_from:]


def instructions(name: str) -> list[str]:
    return [i["value"] for i in final_stage() if i["instruction"] == name]


def test_the_build_has_two_stages_on_a_debian_slim_python_base():
    """A build stage and a runtime stage, both from python:3.11 or 3.12 -slim on Debian."""
    parser = parsed()
    assert parser.is_multistage
    images = parser.parent_images
    assert len(images) == 2
    for image in images:
        assert re.fullmatch(
            r"python:3\.1[12](\.[0-9]+)?-slim-(bookworm|trixie)(@sha256:[0-9a-f]{64})?", image
        ), image


def test_no_image_is_untagged_or_latest():
    """Every FROM names a tag (or digest) and none of them is `latest`."""
    for image in parsed().parent_images:
        _, _, tag = image.partition(":")
        assert tag, f"{image} has no tag"
        assert not tag.startswith("latest"), image


def test_the_runtime_user_is_not_root_and_is_set_before_the_entrypoint():
    """The last USER is a non-zero uid:gid and comes before ENTRYPOINT in the final stage."""
    stage = final_stage()
    kinds = [i["instruction"] for i in stage]
    users = [i["value"] for i in stage if i["instruction"] == "USER"]
    assert users, "the final stage sets no USER"
    uid, _, gid = users[-1].partition(":")
    assert uid.isdigit()
    assert int(uid) != 0
    assert not gid or int(gid) != 0
    last_user = max(n for n, k in enumerate(kinds) if k == "USER")
    assert last_user < kinds.index("ENTRYPOINT")


def test_the_entrypoint_and_command_are_in_exec_form():
    """ENTRYPOINT and CMD are JSON arrays (signals reach the daemon, no shell in between)."""
    (entrypoint,) = instructions("ENTRYPOINT")
    (command,) = instructions("CMD")
    assert json.loads(entrypoint) == ["/opt/line-monitor/bin/monitor"]
    assert json.loads(command) == ["run", "--config", "/etc/line-monitor/plant.yaml"]


def test_the_entrypoint_is_the_projects_console_script():
    """The program the image starts is the `monitor` script that pyproject.toml declares."""
    project = tomllib.loads((REPO / "pyproject.toml").read_text())
    assert "monitor" in project["project"]["scripts"]
    (entrypoint,) = instructions("ENTRYPOINT")
    assert Path(json.loads(entrypoint)[0]).name == "monitor"


def test_stop_signal_volume_and_port_are_declared():
    """STOPSIGNAL SIGTERM, the state directory as a VOLUME, and the health port exposed."""
    assert instructions("STOPSIGNAL") == ["SIGTERM"]
    assert [json.loads(v) for v in instructions("VOLUME")] == [["/var/lib/line-monitor"]]
    assert instructions("EXPOSE") == ["9410"]


def test_the_project_is_pip_installed_into_a_venv_that_the_runtime_copies():
    """The build stage runs `pip install .` into /opt/line-monitor; the runtime copies only that venv."""
    structure = [i for i in parsed().structure if i["instruction"] in ("FROM", "RUN", "COPY")]
    runs = " ".join(i["value"] for i in structure if i["instruction"] == "RUN")
    assert "venv" in runs
    assert re.search(r"pip .*install [^&]*\.(\s|$)", runs)
    copies = [i["value"] for i in final_stage() if i["instruction"] == "COPY"]
    assert copies == ["--from=build /opt/line-monitor /opt/line-monitor"]


def test_the_build_copies_everything_the_package_build_needs():
    """The COPY lines of the build stage bring pyproject.toml, the readme it names and the package."""
    project = tomllib.loads((REPO / "pyproject.toml").read_text())
    copied: set[str] = set()
    for item in parsed().structure:
        if item["instruction"] == "COPY" and not item["value"].startswith("--from"):
            *sources, _ = item["value"].split()
            copied.update(sources)
    assert {"pyproject.toml", project["project"]["readme"], "monitor"} <= copied
    for source in copied:
        assert (REPO / source).exists(), source


def healthcheck_command() -> list[str]:
    (healthcheck,) = instructions("HEALTHCHECK")
    options, _, command = healthcheck.partition("CMD")
    assert "--interval=" in options
    assert "--timeout=" in options
    return json.loads(command)


def test_the_healthcheck_asks_livez_with_python_and_no_curl():
    """HEALTHCHECK runs the venv's python with urllib against /livez, in exec form."""
    command = healthcheck_command()
    assert command[:2] == ["/opt/line-monitor/bin/python", "-c"]
    assert "urllib.request" in command[2]
    assert "/livez" in command[2]
    assert "curl" not in " ".join(command)


@pytest.mark.parametrize(("heartbeat_age", "healthy"), [(0.0, True), (500.0, False)])
def test_the_healthcheck_command_exits_0_only_while_the_daemon_is_live(heartbeat_age: float, healthy: bool):
    """Run against a real health server (port rewritten), the command succeeds when live and fails on 503."""
    command = healthcheck_command()
    server = HealthServer(
        port=0, heartbeat=lambda: heartbeat_age, readiness=lambda: Readiness(True, 0.0, 0.0)
    )
    with server:
        code = command[2].replace("127.0.0.1:9410", f"127.0.0.1:{server.port}")
        assert code != command[2]
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, timeout=60, check=False)
    assert (done.returncode == 0) is healthy


def test_the_image_tells_the_daemon_where_credentials_are():
    """CREDENTIALS_DIRECTORY points at /run/secrets, where Compose mounts secrets."""
    env = " ".join(instructions("ENV"))
    assert "CREDENTIALS_DIRECTORY=/run/secrets" in env
    assert "PYTHONUNBUFFERED=1" in env


def test_the_build_context_leaves_out_the_venv_and_the_secrets():
    """.dockerignore keeps .venv, .git and deploy/secrets out of the image build context."""
    ignored = {
        line.strip()
        for line in (REPO / ".dockerignore").read_text().splitlines()
        if line.strip() and not line.startswith("#")
    }
    assert {".git", ".venv", "deploy/secrets", "deploy/.env"} <= ignored
