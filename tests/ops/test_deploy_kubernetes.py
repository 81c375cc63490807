"""The Kubernetes manifests: kubernetes-validate with offline schemas, and consistency between them."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from ruamel.yaml import YAML

from monitor.sharding import owner, shard_from_environment
from tests.ops.tools import DEPLOY, plant_config

MANIFESTS = sorted((DEPLOY / "kubernetes").glob("*.yaml"))


def load(path: Path) -> dict[str, Any]:
    document = YAML(typ="safe").load(path.read_text())
    assert isinstance(document, dict)
    return document


def by_kind() -> dict[str, dict[str, Any]]:
    found: dict[str, dict[str, Any]] = {}
    for path in MANIFESTS:
        document = load(path)
        assert document["kind"] not in found, f"two {document['kind']} manifests"
        found[document["kind"]] = document
    return found


def statefulset() -> dict[str, Any]:
    return by_kind()["StatefulSet"]


def container() -> dict[str, Any]:
    (only,) = statefulset()["spec"]["template"]["spec"]["containers"]
    return only


def env() -> dict[str, dict[str, Any]]:
    return {item["name"]: item for item in container()["env"]}


def plant() -> dict[str, Any]:
    configmap = by_kind()["ConfigMap"]
    return plant_config(configmap["data"]["plant.yaml"], "configmap.yaml:plant.yaml")


def kubernetes_validate(*paths: Path) -> subprocess.CompletedProcess[str]:
    tool = shutil.which("kubernetes-validate", path=str(Path(sys.executable).parent))
    assert tool is not None, "kubernetes-validate is missing from the test environment"
    return subprocess.run(
        [tool, "--strict", *map(str, paths)], capture_output=True, text=True, timeout=300, check=False
    )


def test_there_are_a_statefulset_a_configmap_a_secret_and_a_service():
    """The four manifests the deployment needs, one of each kind."""
    assert set(by_kind()) == {"StatefulSet", "ConfigMap", "Secret", "Service"}


@pytest.mark.parametrize("manifest", MANIFESTS, ids=[p.name for p in MANIFESTS])
def test_each_manifest_passes_kubernetes_validate_strictly(manifest: Path):
    """kubernetes-validate --strict (offline schemas of the newest Kubernetes it knows) accepts the manifest."""
    done = kubernetes_validate(manifest)
    assert done.returncode == 0, done.stdout + done.stderr


def test_strict_validation_catches_a_misspelled_field(tmp_path: Path):
    """The same check fails on a misspelled StatefulSet field, so the test above can fail."""
    broken = tmp_path / "statefulset.yaml"
    broken.write_text(
        (DEPLOY / "kubernetes" / "statefulset.yaml")
        .read_text()
        .replace("podManagementPolicy", "podManagmentPolicy")
    )
    done = kubernetes_validate(broken)
    assert done.returncode != 0
    assert "podManagmentPolicy" in done.stdout + done.stderr


def test_three_replicas_start_in_parallel_and_the_shard_count_equals_the_replicas():
    """replicas 3, podManagementPolicy Parallel, and MONITOR_SHARD_COUNT equal to replicas."""
    spec = statefulset()["spec"]
    assert spec["replicas"] == 3
    assert spec["podManagementPolicy"] == "Parallel"
    assert int(env()["MONITOR_SHARD_COUNT"]["value"]) == spec["replicas"]


def test_the_shard_index_comes_from_the_pod_index_label_and_the_name_as_fallback():
    """MONITOR_SHARD_INDEX is the downward-API pod-index label; MONITOR_POD_NAME is metadata.name."""
    variables = env()
    index = variables["MONITOR_SHARD_INDEX"]["valueFrom"]["fieldRef"]["fieldPath"]
    assert index == "metadata.labels['apps.kubernetes.io/pod-index']"
    assert variables["MONITOR_POD_NAME"]["valueFrom"]["fieldRef"]["fieldPath"] == "metadata.name"


def test_every_pod_of_the_statefulset_finds_its_own_shard():
    """For each ordinal, the environment a pod gets (label, or pod name alone) gives shard (ordinal, replicas)."""
    sts = statefulset()
    replicas, name = sts["spec"]["replicas"], sts["metadata"]["name"]
    count = env()["MONITOR_SHARD_COUNT"]["value"]
    for ordinal in range(replicas):
        with_label = {
            "MONITOR_SHARD_COUNT": count,
            "MONITOR_SHARD_INDEX": str(ordinal),
            "MONITOR_POD_NAME": f"{name}-{ordinal}",
        }
        without_label = {
            "MONITOR_SHARD_COUNT": count,
            "MONITOR_SHARD_INDEX": "",
            "MONITOR_POD_NAME": f"{name}-{ordinal}",
        }
        assert shard_from_environment(with_label) == (ordinal, replicas)
        assert shard_from_environment(without_label) == (ordinal, replicas)


def test_the_configured_charts_each_have_one_owner_among_the_replicas():
    """Every chart of the ConfigMap's plant file is owned by a shard that exists."""
    replicas = statefulset()["spec"]["replicas"]
    for chart in plant()["charts"]:
        assert 0 <= owner(chart["id"], replicas) < replicas


def resolved_port(port: int | str) -> int:
    if isinstance(port, int):
        return port
    (match,) = [p["containerPort"] for p in container()["ports"] if p["name"] == port]
    return int(match)


def test_the_probes_ask_livez_and_readyz_on_the_health_port_of_the_config_map():
    """Liveness and startup probe /livez, readiness /readyz, all on health.port of the plant file."""
    health = plant()["health"]
    c = container()
    probes = {"livenessProbe": "/livez", "startupProbe": "/livez", "readinessProbe": "/readyz"}
    for probe, path in probes.items():
        get = c[probe]["httpGet"]
        assert get["path"] == path, probe
        assert resolved_port(get["port"]) == health["port"], probe


def test_the_health_endpoint_listens_where_the_kubelet_can_reach_it():
    """The plant file binds the health endpoint to all of the pod's addresses (probes come from the node)."""
    assert plant()["health"]["host"] in ("0.0.0.0", "::")  # noqa: S104 - what a pod needs


def test_the_headless_service_matches_the_statefulset():
    """The Service is headless, is the StatefulSet's serviceName, selects its pods and targets the health port."""
    service, sts = by_kind()["Service"], statefulset()
    assert service["spec"]["clusterIP"] == "None"
    assert sts["spec"]["serviceName"] == service["metadata"]["name"]
    labels = sts["spec"]["template"]["metadata"]["labels"]
    assert service["spec"]["selector"].items() <= labels.items()
    assert sts["spec"]["selector"]["matchLabels"].items() <= labels.items()
    (port,) = service["spec"]["ports"]
    assert resolved_port(port["targetPort"]) == plant()["health"]["port"]


def test_the_pod_runs_as_a_non_root_user_without_privileges():
    """runAsNonRoot with uid 10001, no privilege escalation, a read-only root, no capabilities, seccomp default."""
    pod = statefulset()["spec"]["template"]["spec"]
    assert pod["securityContext"]["runAsNonRoot"] is True
    assert pod["securityContext"]["runAsUser"] == 10001
    assert pod["securityContext"]["seccompProfile"] == {"type": "RuntimeDefault"}
    assert pod["automountServiceAccountToken"] is False
    security = container()["securityContext"]
    assert security["allowPrivilegeEscalation"] is False
    assert security["readOnlyRootFilesystem"] is True
    assert security["capabilities"] == {"drop": ["ALL"]}


def test_the_container_states_its_resources():
    """CPU and memory requests, and a memory limit."""
    resources = container()["resources"]
    assert set(resources["requests"]) == {"cpu", "memory"}
    assert "memory" in resources["limits"]


def test_the_config_map_and_secret_the_pod_uses_are_the_ones_defined():
    """Volumes and secretKeyRefs name the ConfigMap and Secret of these manifests and keys they hold."""
    kinds = by_kind()
    secret, configmap = kinds["Secret"], kinds["ConfigMap"]
    volumes = {v["name"]: v for v in statefulset()["spec"]["template"]["spec"]["volumes"]}
    assert volumes["config"]["configMap"]["name"] == configmap["metadata"]["name"]
    assert volumes["credentials"]["secret"]["secretName"] == secret["metadata"]["name"]
    keys = set(secret["stringData"])
    for item in volumes["credentials"]["secret"]["items"]:
        assert item["key"] in keys
    ref = env()["PGPASSWORD"]["valueFrom"]["secretKeyRef"]
    assert ref["name"] == secret["metadata"]["name"]
    assert ref["key"] in keys


def test_the_broker_password_file_is_where_credentials_directory_points():
    """password_file in the plant file is an item of the Secret volume mounted at $CREDENTIALS_DIRECTORY."""
    credentials = env()["CREDENTIALS_DIRECTORY"]["value"]
    mounts = {m["name"]: m["mountPath"] for m in container()["volumeMounts"]}
    assert mounts["credentials"] == credentials
    volumes = {v["name"]: v for v in statefulset()["spec"]["template"]["spec"]["volumes"]}
    paths = {item["path"] for item in volumes["credentials"]["secret"]["items"]}
    assert plant()["broker"]["password_file"] in paths
    assert mounts["config"] == "/etc/line-monitor"
    assert container()["args"] == ["run", "--config", "/etc/line-monitor/plant.yaml"]


def test_the_secret_holds_placeholders_only():
    """The Secret's values are CHANGE-ME placeholders, never a real password."""
    for value in by_kind()["Secret"]["stringData"].values():
        assert value.startswith("CHANGE-ME")


def test_the_grace_period_covers_the_daemons_clean_stop():
    """terminationGracePeriodSeconds is at least the 30 s the systemd unit and Compose give."""
    assert statefulset()["spec"]["template"]["spec"]["terminationGracePeriodSeconds"] >= 30
