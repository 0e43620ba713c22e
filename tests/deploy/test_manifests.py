"""deploy/: the Kubernetes manifests pass a schema validator and carry the controls they claim.

The validator is kubernetes-validate (PyPI), which bundles the Kubernetes OpenAPI schemas of each
release as JSON Schema, so it runs offline. Manifests are checked strictly (unknown fields are
errors) against the oldest release the manifests use fields of (1.27: matchLabelKeys in topology
spread) and the newest bundled one.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import kubernetes_validate  # type: ignore[import-untyped]
import pytest
import yaml
from pydantic import ValidationError

from service.settings import Settings

KUBERNETES = Path(__file__).resolve().parents[2] / "deploy" / "kubernetes"
MANIFESTS = sorted(KUBERNETES.glob("*.yaml"))
OLDEST_KUBERNETES = "1.27.0"


def documents(path: Path) -> list[dict[str, Any]]:
    return [d for d in yaml.safe_load_all(path.read_text()) if d is not None]


def all_documents() -> list[dict[str, Any]]:
    return [d for path in MANIFESTS for d in documents(path)]


def by_kind(kind: str) -> list[dict[str, Any]]:
    return [d for d in all_documents() if d["kind"] == kind]


def pod_templates() -> list[tuple[str, dict[str, Any]]]:
    """(name, pod spec) of everything that runs pods."""
    found = []
    for doc in all_documents():
        if doc["kind"] in ("Deployment", "Job", "StatefulSet", "DaemonSet"):
            found.append((f"{doc['kind']}/{doc['metadata']['name']}", doc["spec"]["template"]["spec"]))
    return found


def env_of(container: dict[str, Any]) -> dict[str, str]:
    return {e["name"]: e["value"] for e in container.get("env", []) if "value" in e}


def test_there_are_manifests() -> None:
    kinds = {d["kind"] for d in all_documents()}
    assert {"Deployment", "Job", "Service", "ServiceAccount", "Secret", "PodDisruptionBudget"} <= kinds


@pytest.mark.parametrize("version", [OLDEST_KUBERNETES, kubernetes_validate.latest_version()])
@pytest.mark.parametrize("path", MANIFESTS, ids=lambda p: p.name)
def test_manifest_passes_the_kubernetes_schema(path: Path, version: str) -> None:
    for doc in documents(path):
        kubernetes_validate.validate(doc, version, strict=True)


def test_the_validator_refuses_a_broken_manifest() -> None:
    """The check above can fail: a misspelt field and a wrong type are both refused."""
    deployment = by_kind("Deployment")[0]
    misspelt = yaml.safe_load(yaml.safe_dump(deployment))
    misspelt["spec"]["template"]["spec"]["containers"][0]["securityContex"] = {}
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(misspelt, OLDEST_KUBERNETES, strict=True)
    wrong_type = yaml.safe_load(yaml.safe_dump(deployment))
    wrong_type["spec"]["replicas"] = "three"
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(wrong_type, OLDEST_KUBERNETES, strict=True)


@pytest.mark.parametrize("name,pod", pod_templates(), ids=[n for n, _ in pod_templates()])
def test_every_pod_meets_the_restricted_pod_security_standard(name: str, pod: dict[str, Any]) -> None:
    """The controls of Kubernetes' Pod Security Standards, "restricted" profile (from its docs,
    from memory): non-root, no privilege escalation, all capabilities dropped, RuntimeDefault
    seccomp; and ours beyond it: read-only root filesystem, no service-account token, resources."""
    assert pod["securityContext"]["runAsNonRoot"] is True
    assert pod["securityContext"].get("runAsUser", 1) != 0
    assert pod["securityContext"]["seccompProfile"]["type"] in ("RuntimeDefault", "Localhost")
    assert pod["automountServiceAccountToken"] is False
    assert pod["serviceAccountName"] == "mixline"
    assert not pod.get("hostNetwork") and not pod.get("hostPID") and not pod.get("hostIPC")
    for container in pod["containers"] + pod.get("initContainers", []):
        context = container["securityContext"]
        assert context["allowPrivilegeEscalation"] is False, container["name"]
        assert context["capabilities"]["drop"] == ["ALL"], container["name"]
        assert not context["capabilities"].get("add"), container["name"]
        assert context["readOnlyRootFilesystem"] is True, container["name"]
        assert not context.get("privileged"), container["name"]
        assert context.get("runAsNonRoot", True) is True, container["name"]
        resources = container["resources"]
        assert resources["requests"]["cpu"] and resources["requests"]["memory"], container["name"]
        assert resources["limits"]["memory"], container["name"]
        # The only writable place is /tmp; anything else mounted (the signing key) is read-only.
        assert {m["mountPath"] for m in container.get("volumeMounts", []) if not m.get("readOnly")} == {"/tmp"}


def test_the_service_account_mounts_no_token() -> None:
    (account,) = by_kind("ServiceAccount")
    assert account["metadata"]["name"] == "mixline"
    assert account["automountServiceAccountToken"] is False


def test_replicas_spread_over_nodes_and_zones() -> None:
    (deployment,) = by_kind("Deployment")
    constraints = deployment["spec"]["template"]["spec"]["topologySpreadConstraints"]
    assert {c["topologyKey"] for c in constraints} == {"kubernetes.io/hostname", "topology.kubernetes.io/zone"}
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    for c in constraints:
        assert c["maxSkew"] == 1
        assert c["labelSelector"]["matchLabels"].items() <= labels.items()


def test_shutdown_drains_before_the_process_stops() -> None:
    """preStop sleeps while endpoints forget the pod; the grace period covers the sleep, uvicorn's
    graceful shutdown and a margin for the log writer; readiness is /readyz (503 once draining)."""
    from service.cli import GRACEFUL_SHUTDOWN_SECONDS

    (deployment,) = by_kind("Deployment")
    pod = deployment["spec"]["template"]["spec"]
    (container,) = pod["containers"]
    command = container["lifecycle"]["preStop"]["exec"]["command"]
    assert command[0] == "sleep"
    pre_stop = int(command[1])
    assert pre_stop >= 5
    assert pod["terminationGracePeriodSeconds"] >= pre_stop + GRACEFUL_SHUTDOWN_SECONDS + 5
    assert container["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert container["livenessProbe"]["httpGet"]["path"] == "/livez"
    # A rollout never takes a ready replica away before its successor is ready.
    assert deployment["spec"]["strategy"]["rollingUpdate"]["maxUnavailable"] == 0


# PostgreSQL's defaults (its documentation, from memory): max_connections 100, of which
# superuser_reserved_connections 3 are kept for superusers.
POSTGRES_MAX_CONNECTIONS = 100
POSTGRES_SUPERUSER_RESERVED = 3
# Terminating pods are not counted against maxSurge by the Deployment controller (from memory),
# so a rollout can briefly have old pods still draining beside the surge; budget two of them.
TERMINATING_PODS = 2


def _pool(container: dict[str, Any]) -> int:
    env = env_of(container)
    # Unset, Settings' defaults apply: read them from Settings, not from a copy here.
    settings = Settings.model_validate(
        {k.removeprefix("MIXLINE_").lower(): v for k, v in env.items() if k.startswith("MIXLINE_DB_")}
    )
    return settings.db_pool_size + settings.db_max_overflow


def test_replicas_and_a_rolling_surge_stay_under_postgresql_max_connections() -> None:
    (deployment,) = by_kind("Deployment")
    (job,) = by_kind("Job")
    (replica,) = deployment["spec"]["template"]["spec"]["containers"]
    (migrate,) = job["spec"]["template"]["spec"]["containers"]
    pods = deployment["spec"]["replicas"] + deployment["spec"]["strategy"]["rollingUpdate"]["maxSurge"] + TERMINATING_PODS
    total = pods * _pool(replica) + _pool(migrate)
    assert total <= POSTGRES_MAX_CONNECTIONS - POSTGRES_SUPERUSER_RESERVED, total
    # The comment in deployment.yaml shows this sum; keep it true.
    assert f"= {total} <=" in (KUBERNETES / "deployment.yaml").read_text()
    # Without the pool settings (Settings' defaults, 10 + 20) the same rollout would not fit.
    assert pods * (Settings().db_pool_size + Settings().db_max_overflow) > POSTGRES_MAX_CONNECTIONS


def test_the_migration_job_can_be_applied_again() -> None:
    from service.version import VERSION

    (job,) = by_kind("Job")
    assert job["metadata"]["name"] == "mixline-migrate-" + re.sub(r"[^a-z0-9]+", "-", VERSION.lower())
    assert 0 < job["spec"]["ttlSecondsAfterFinished"] <= 7 * 86400
    assert job["spec"]["template"]["spec"]["restartPolicy"] == "Never"
    (container,) = job["spec"]["template"]["spec"]["containers"]
    assert container["args"] == ["migrate"]


def test_the_example_secret_fails_the_production_check() -> None:
    (secret,) = by_kind("Secret")
    values = secret["stringData"]
    assert all("PLACEHOLDER" in v for v in values.values())
    settings = {k.removeprefix("MIXLINE_").lower(): v for k, v in values.items()}
    with pytest.raises(ValidationError, match="BOOTSTRAP_OPERATOR_KEY"):
        Settings.model_validate({**settings, "environment": "production"})
    Settings.model_validate(settings)  # development accepts it: the refusal is production's
