"""The Compose file: the Compose specification's schema, yamllint, and consistency with its files."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from ruamel.yaml import YAML

from tests.ops.tools import DEPLOY, YAMLLINT_CONFIG, plant_config

COMPOSE = DEPLOY / "compose.yaml"
PLANT = DEPLOY / "compose" / "plant.yaml"


def compose() -> dict[str, Any]:
    document = YAML(typ="safe").load(COMPOSE.read_text())
    assert isinstance(document, dict)
    return document


def services() -> dict[str, dict[str, Any]]:
    return compose()["services"]


def venv_tool(name: str) -> str:
    """A command-line tool installed in the test environment's bin directory."""
    found = shutil.which(name, path=str(Path(sys.executable).parent))
    assert found is not None, f"{name} is missing from the test environment: pip install {name}"
    return found


def test_compose_file_validates_against_the_compose_specification_schema():
    """check-jsonschema with its vendored Compose specification schema (Apache-2.0, compose-spec/compose-spec) passes."""
    done = subprocess.run(
        [venv_tool("check-jsonschema"), "--builtin-schema", "vendor.compose-spec", str(COMPOSE)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stdout + done.stderr


def test_the_schema_check_catches_a_misspelled_key(tmp_path: Path):
    """The same check fails on a misspelled service key, so the test above can fail."""
    broken = tmp_path / "compose.yaml"
    broken.write_text(COMPOSE.read_text().replace("    healthcheck:", "    healthchek:", 1))
    done = subprocess.run(
        [venv_tool("check-jsonschema"), "--builtin-schema", "vendor.compose-spec", str(broken)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode != 0
    assert "healthchek" in done.stdout


def test_every_deployment_yaml_file_passes_yamllint():
    """yamllint (default rules, 110-column lines) finds nothing in compose.yaml, the plant files and the manifests."""
    files = [COMPOSE, PLANT, *sorted((DEPLOY / "kubernetes").glob("*.yaml"))]
    done = subprocess.run(
        [venv_tool("yamllint"), "--strict", "-d", YAMLLINT_CONFIG, *map(str, files)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stdout


def test_the_stack_has_a_broker_a_database_and_the_monitor_with_health_checks():
    """broker (eclipse-mosquitto), database (postgres) and monitor each have a health check."""
    found = services()
    assert found["broker"]["image"].startswith("eclipse-mosquitto:")
    assert found["database"]["image"].startswith("postgres:")
    assert found["monitor"]["build"]["dockerfile"] == "deploy/Containerfile"
    for name in ("broker", "database", "monitor"):
        assert found[name]["healthcheck"]["test"], name


def test_the_monitor_starts_after_the_broker_and_database_are_healthy():
    """depends_on waits for service_healthy; the broker waits for its password file to be made."""
    found = services()
    assert found["monitor"]["depends_on"] == {
        "broker": {"condition": "service_healthy"},
        "database": {"condition": "service_healthy"},
    }
    assert found["broker"]["depends_on"] == {
        "broker-password": {"condition": "service_completed_successfully"}
    }


def test_no_image_uses_the_latest_tag():
    """Every image names a version tag."""
    for name, service in services().items():
        image = service.get("image")
        if image is None:
            continue
        _, _, tag = image.partition(":")
        assert tag, f"{name}: {image} has no tag"
        assert tag != "latest", name


def test_the_broker_password_reaches_the_monitor_as_a_secret_named_like_its_password_file():
    """The monitor gets the broker_password secret; the plant file reads it as password_file broker_password."""
    document = compose()
    assert document["secrets"]["broker_password"] == {"file": "./secrets/broker_password"}
    assert "broker_password" in services()["monitor"]["secrets"]
    plant = plant_config(PLANT.read_text(), str(PLANT))
    broker = plant["broker"]
    assert isinstance(broker, dict)
    assert broker["password_file"] == "broker_password"  # noqa: S105 - a file name, not a password
    assert "password" not in broker
    # and the Containerfile points CREDENTIALS_DIRECTORY at /run/secrets, where Compose mounts it
    assert "CREDENTIALS_DIRECTORY=/run/secrets" in (DEPLOY / "Containerfile").read_text()


def test_the_plant_file_points_at_the_stacks_services():
    """The monitor's configuration names the broker and database services and a PostgreSQL URL without a password."""
    plant = plant_config(PLANT.read_text(), str(PLANT))
    broker, storage = plant["broker"], plant["storage"]
    assert isinstance(broker, dict)
    assert isinstance(storage, dict)
    assert broker["host"] == "broker"
    assert storage["url"].startswith("postgresql://monitor@database:5432/")
    assert set(services()) >= {"broker", "database"}


def test_the_health_port_matches_the_published_port_and_the_healthcheck():
    """health.port in the plant file is the port published on 127.0.0.1 and the one the health check asks."""
    plant = plant_config(PLANT.read_text(), str(PLANT))
    health = plant["health"]
    assert isinstance(health, dict)
    port = health["port"]
    monitor = services()["monitor"]
    assert monitor["ports"] == [f"127.0.0.1:{port}:{port}"]
    assert f"127.0.0.1:{port}/livez" in " ".join(monitor["healthcheck"]["test"])


def test_published_ports_are_bound_to_the_hosts_loopback_only():
    """Every published port is 127.0.0.1:...: nothing is opened to the network by default."""
    for name, service in services().items():
        for port in service.get("ports", []):
            assert str(port).startswith("127.0.0.1:"), name


def test_the_mounted_files_exist():
    """Every relative bind mount and secret file source exists in the checkout (the secret itself excepted)."""
    for service in services().values():
        for volume in service.get("volumes", []):
            source = volume.split(":", 1)[0]
            if source.startswith("./"):
                assert (DEPLOY / source).exists(), source
    assert (DEPLOY / "secrets" / ".gitignore").read_text().split() == ["*", "!.gitignore"]


def test_the_monitor_runs_as_a_non_root_user_with_a_read_only_root():
    """user 10001, read_only, no capabilities, no new privileges, and a 30 s stop grace for SIGTERM."""
    monitor = services()["monitor"]
    assert monitor["user"] == "10001:10001"
    assert monitor["read_only"] is True
    assert monitor["cap_drop"] == ["ALL"]
    assert "no-new-privileges:true" in monitor["security_opt"]
    assert (monitor["stop_signal"], monitor["stop_grace_period"]) == ("SIGTERM", "30s")


@pytest.mark.parametrize("name", ["broker", "broker-password"])
def test_the_broker_services_mount_the_password_where_the_commands_read_it(name: str):
    """The one-shot and the broker's health check read /run/secrets/broker_password, which they mount."""
    service = services()[name]
    assert service["secrets"] == ["broker_password"]
    text = COMPOSE.read_text()
    assert "/run/secrets/broker_password" in text
