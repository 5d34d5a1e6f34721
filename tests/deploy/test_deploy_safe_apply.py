"""Deploy files that are safe to apply again and again: checked structurally (no Docker engine or
kubectl here), and the compose tokens step run for real with the shell.

Semantics from the Kubernetes API reference and documentation: a Deployment's ``spec.replicas``
is reset by every apply that states it, fighting a HorizontalPodAutoscaler ("Migrating
Deployments and StatefulSets to horizontal autoscaling"); NetworkPolicy (networking.k8s.io/v1:
a pod selected by an Ingress policy accepts only what a rule allows, an empty ``from`` allows
everyone); Ingress (networking.k8s.io/v1, ``tls.hosts`` must match the rule hosts); kustomize's
``secretGenerator`` and ``generatorOptions.disableNameSuffixHash``. Compose specification: ``$$``
is a literal ``$``, ``profiles`` keep a service out of ``up``.
"""

from __future__ import annotations

import os
import subprocess

import pytest
import yaml
from scaleout.deploy_files import COMPOSE_FILE, KUBERNETES, OVERLAY, manifests, one

from service.tokens import add_token, read_tokens

REPOSITORY_IGNORES = (KUBERNETES.parents[1] / ".gitignore").read_text().splitlines()


def _overlay() -> dict:
    return yaml.safe_load((OVERLAY / "kustomization.yaml").read_text())


def _pod_labels() -> dict:
    return one("Deployment")["spec"]["template"]["metadata"]["labels"]


def _selects(selector: dict, labels: dict) -> bool:
    return selector.get("matchLabels", {}).items() <= labels.items() and not selector.get("matchExpressions")


def test_no_deployment_scaled_by_an_autoscaler_states_its_replicas():
    targets = {(document["spec"]["scaleTargetRef"]["kind"], document["spec"]["scaleTargetRef"]["name"])
               for _, document in manifests() if document["kind"] == "HorizontalPodAutoscaler"}
    for _, document in manifests():
        if (document.get("kind"), document.get("metadata", {}).get("name")) in targets:
            assert "replicas" not in document["spec"], document["metadata"]["name"]


def test_the_base_holds_no_secret_so_an_apply_cannot_replace_real_tokens():
    assert [name for name, document in manifests() if document.get("kind") == "Secret"] == []


def test_the_overlay_generates_the_tokens_secret_the_pods_mount_and_keeps_its_name():
    [volume] = [volume for volume in one("Deployment")["spec"]["template"]["spec"]["volumes"] if "secret" in volume]
    [generated] = _overlay()["secretGenerator"]
    assert generated["name"] == volume["secret"]["secretName"]
    assert generated["namespace"] == yaml.safe_load((KUBERNETES / "kustomization.yaml").read_text())["namespace"]
    # A stable name is updated in place, so the mounted file changes under running pods.
    assert generated["options"]["disableNameSuffixHash"] is True


def test_the_overlays_tokens_file_is_kept_out_of_the_repository():
    [generated] = _overlay()["secretGenerator"]
    for name in generated["files"]:
        assert f"/deploy/overlays/*/{name}" in REPOSITORY_IGNORES


def test_the_overlay_builds_on_the_base_and_names_a_registry_and_a_storage_class():
    overlay = _overlay()
    assert (OVERLAY / overlay["resources"][0]).resolve() == KUBERNETES.resolve()
    images = {image["name"]: image for image in overlay["images"]}
    assert set(images) == {"rbfgate", "rbfgate-tools"}
    assert all("/" in image["newName"] for image in images.values())  # a registry host, not the bare name
    [patch] = overlay["patches"]
    assert patch["target"] == {"kind": "PersistentVolumeClaim", "name": one("PersistentVolumeClaim")["metadata"]["name"]}
    [operation] = yaml.safe_load((OVERLAY / patch["path"]).read_text())
    assert operation["path"] == "/spec/storageClassName" and operation["value"]
    for resource in overlay["resources"][1:]:
        assert (OVERLAY / resource).is_file()


def test_the_network_policy_selects_the_scoring_pods_and_admits_only_two_sources():
    policy = one("NetworkPolicy")
    spec = policy["spec"]
    assert policy["apiVersion"] == "networking.k8s.io/v1"
    assert _selects(spec["podSelector"], _pod_labels())
    assert spec["policyTypes"] == ["Ingress"]
    port_names = {port["name"] for port in one("Deployment")["spec"]["template"]["spec"]["containers"][0]["ports"]}
    sources = []
    for rule in spec["ingress"]:
        assert rule["from"], "an empty 'from' admits every source"
        assert [port["port"] for port in rule["ports"]] == ["http"] and "http" in port_names
        for peer in rule["from"]:
            # Both selectors in one peer: those pods in that namespace, not any pod or any namespace.
            assert peer["namespaceSelector"]["matchLabels"] and peer["podSelector"]["matchLabels"]
            sources.append(peer["podSelector"]["matchLabels"]["app.kubernetes.io/name"])
    assert sorted(sources) == ["ingress-nginx", "prometheus"]


def test_the_example_ingress_terminates_tls_for_its_host_and_routes_to_the_service():
    ingress = yaml.safe_load((OVERLAY / "ingress.yaml").read_text())
    spec = ingress["spec"]
    [tls] = spec["tls"]
    [rule] = spec["rules"]
    assert tls["secretName"] and tls["hosts"] == [rule["host"]]
    [path] = rule["http"]["paths"]
    service = one("Service")
    assert path["backend"]["service"]["name"] == service["metadata"]["name"]
    assert path["backend"]["service"]["port"]["name"] in {port["name"] for port in service["spec"]["ports"]}
    limit = yaml.safe_load((KUBERNETES / "configmap.yaml").read_text())["data"]["RBFGATE_SERVE_MAX_BODY_BYTES"]
    assert ingress["metadata"]["annotations"]["nginx.ingress.kubernetes.io/proxy-body-size"] == f"{int(limit) // 2**20}m"


def _compose() -> dict:
    return yaml.safe_load(COMPOSE_FILE.read_text())


def test_compose_needs_no_file_from_the_host():
    document = _compose()
    assert "secrets" not in document
    for name, service in document["services"].items():
        for mount in service.get("volumes", []):
            source = mount.split(":")[0]
            assert source in document["volumes"], f"{name} mounts {source} from the host"


def test_compose_creates_the_tokens_file_before_the_service_starts_and_offers_a_tokens_command():
    services = _compose()["services"]
    assert services["serve"]["depends_on"]["tokens-init"]["condition"] == "service_completed_successfully"
    tokens_file = services["serve"]["environment"]["RBFGATE_TOKENS"]
    for name in ("tokens-init", "tokens"):
        assert services[name]["environment"]["RBFGATE_TOKENS"] == tokens_file
        assert services[name]["volumes"] == [f"tokens:{os.path.dirname(tokens_file)}"]
    assert f"tokens:{os.path.dirname(tokens_file)}:ro" in services["serve"]["volumes"]
    assert services["tokens"]["entrypoint"] == ["rbfgate", "token"] and services["tokens"]["profiles"] == ["tools"]


def _run_tokens_init(tokens_file) -> None:
    init = _compose()["services"]["tokens-init"]
    assert init["entrypoint"] == ["sh", "-c"]
    [script] = init["command"]
    subprocess.run(["sh", "-c", script.replace("$$", "$")], check=True, timeout=30,
                   env={"PATH": os.environ["PATH"], "RBFGATE_TOKENS": str(tokens_file)})


def test_the_compose_tokens_step_writes_a_tokens_file_the_service_accepts(tmp_path):
    tokens_file = tmp_path / "tokens.json"
    _run_tokens_init(tokens_file)
    assert read_tokens(tokens_file) == []  # valid and empty: every token refused until one is added


def test_the_compose_tokens_step_keeps_the_tokens_added_since(tmp_path):
    tokens_file = tmp_path / "tokens.json"
    _run_tokens_init(tokens_file)
    add_token(tokens_file, "ops-alice", "operate")
    _run_tokens_init(tokens_file)  # a later `docker compose up`
    assert [entry.name for entry in read_tokens(tokens_file)] == ["ops-alice"]


@pytest.mark.parametrize("kind", ["Deployment", "NetworkPolicy", "Service", "PodDisruptionBudget"])
def test_every_selector_of_the_scoring_pods_matches_their_labels(kind):
    spec = one(kind)["spec"]
    selector = spec.get("podSelector") or spec["selector"]
    assert _selects(selector if "matchLabels" in selector else {"matchLabels": selector}, _pod_labels())


@pytest.mark.parametrize("release", ["1.29", "latest"])
def test_the_example_ingress_is_a_valid_kubernetes_object(release):
    # The same offline strict schemas as test_deploy_manifests.py (kubernetes-validate, the test extra).
    from kubernetes_validate import validate
    from kubernetes_validate.utils import latest_version

    validate(yaml.safe_load((OVERLAY / "ingress.yaml").read_text()), latest_version() if release == "latest" else release,
             strict=True)
