"""deploy/kubernetes and deploy/compose.yaml, parsed with PyYAML and compared with the code.

The environment variable names come from service.settings.ENVIRON_KEYS and the routes from the
app ``rbfgate serve`` runs, so a renamed setting or route fails here instead of leaving the
manifests stale. Field names and semantics: the Kubernetes API reference (apps/v1 Deployment,
v1 Service, autoscaling/v2 HorizontalPodAutoscaler, policy/v1 PodDisruptionBudget, batch/v1 Job,
v1 PersistentVolumeClaim, Secret, ConfigMap) and the Compose specification.
Prometheus' ``prometheus.io/*`` pod annotations are common practice, not a standard.
"""

from __future__ import annotations

import posixpath
import re
from importlib.metadata import version as installed_version

import pytest
import yaml
from scaleout.deploy_files import COMPOSE_FILE, KUBERNETES, OVERLAY, app_routes, dockerfile_stages, manifests, one

from model_store.store.layout import SETTINGS_FILE
from service.settings import ENVIRON_KEYS, Settings

REQUIRED_KINDS = {"Deployment", "Service", "HorizontalPodAutoscaler", "PodDisruptionBudget",
                  "PersistentVolumeClaim", "ConfigMap", "Job", "NetworkPolicy"}  # the Secret comes from an overlay


def serving_stage_environment() -> dict[str, str]:
    environment = {}
    for stage in dockerfile_stages():
        if stage.name in ("base", "serve"):
            environment.update(stage.environment())
    return environment


def pod(kind: str) -> dict:
    return one(kind)["spec"]["template"]["spec"]


def container(kind: str) -> dict:
    [found] = pod(kind)["containers"]
    return found


def settings_data() -> dict[str, str]:
    return one("ConfigMap")["data"]


def mount_of(kind: str, volume_source: str) -> dict:
    """The volume mount of the main container whose volume has ``volume_source`` (e.g. "secret")."""
    [volume] = [volume for volume in pod(kind)["volumes"] if volume_source in volume]
    [mount] = [mount for mount in container(kind)["volumeMounts"] if mount["name"] == volume["name"]]
    return mount


def cores(quantity: str) -> float:
    return float(quantity[:-1]) / 1000 if quantity.endswith("m") else float(quantity)


@pytest.fixture(scope="module")
def routes(tmp_path_factory) -> set[tuple[str, str]]:
    """(method, path) of every route of the real app."""
    return app_routes(tmp_path_factory.mktemp("routes"))

def test_the_kustomization_lists_every_manifest_file():
    kustomization = yaml.safe_load((KUBERNETES / "kustomization.yaml").read_text())
    files = {path.name for path in KUBERNETES.glob("*.yaml")} - {"kustomization.yaml"}
    assert sorted(kustomization["resources"]) == sorted(files)


def test_the_manifests_hold_every_kind_an_operator_needs():
    assert REQUIRED_KINDS <= {document["kind"] for _, document in manifests()}


def test_the_deployment_runs_at_least_two_replicas_and_rolls_without_losing_capacity():
    spec = one("Deployment")["spec"]
    assert one("HorizontalPodAutoscaler")["spec"]["minReplicas"] >= 2  # the autoscaler owns the scale
    assert spec["strategy"]["type"] == "RollingUpdate" and spec["strategy"]["rollingUpdate"]["maxUnavailable"] == 0


@pytest.mark.parametrize("probe, path", [("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")])
def test_the_probes_ask_routes_the_app_has_on_the_serving_port(routes, probe, path):
    check = container("Deployment")[probe]["httpGet"]
    named = {port["name"]: port["containerPort"] for port in container("Deployment")["ports"]}
    assert check["path"] == path and ("GET", path) in routes
    assert check["port"] in named


def test_the_container_port_is_the_port_the_image_and_the_settings_use():
    [port] = container("Deployment")["ports"]
    assert port["containerPort"] == int(settings_data()["RBFGATE_SERVE_PORT"])
    assert port["containerPort"] == int(serving_stage_environment()["RBFGATE_SERVE_PORT"])


def test_prometheus_is_told_where_the_metrics_are(routes):
    annotations = one("Deployment")["spec"]["template"]["metadata"]["annotations"]
    [port] = container("Deployment")["ports"]
    assert annotations["prometheus.io/scrape"] == "true"
    assert int(annotations["prometheus.io/port"]) == port["containerPort"]
    assert ("GET", annotations["prometheus.io/path"]) in routes


def test_the_settings_configmap_holds_every_variable_the_service_reads_and_no_other():
    assert set(settings_data()) == set(ENVIRON_KEYS.values())


def test_the_settings_configmap_values_are_accepted_by_the_service():
    settings = Settings.from_environ(settings_data())
    assert settings.workers >= 1 and settings.host == "0.0.0.0"  # all interfaces: the pod IP must answer


def test_the_deployment_passes_only_variables_the_service_reads():
    main = container("Deployment")
    names = {entry["name"] for entry in main.get("env", [])}
    assert names <= set(ENVIRON_KEYS.values())
    assert [source["configMapRef"]["name"] for source in main["envFrom"]] == [one("ConfigMap")["metadata"]["name"]]


def test_the_store_is_the_shared_claim_mounted_where_the_settings_say():
    claim = one("PersistentVolumeClaim")
    store = settings_data()["RBFGATE_STORE"]
    assert "ReadWriteMany" in claim["spec"]["accessModes"]
    for kind in ("Deployment", "Job"):
        mount = mount_of(kind, "persistentVolumeClaim")
        [volume] = [volume for volume in pod(kind)["volumes"] if volume["name"] == mount["name"]]
        assert volume["persistentVolumeClaim"]["claimName"] == claim["metadata"]["name"]
        assert mount["mountPath"] == store and not mount.get("readOnly", False)  # activation writes the store
    assert store == serving_stage_environment()["RBFGATE_STORE"]


def test_the_tokens_file_comes_from_the_secret_where_the_settings_say():
    tokens = settings_data()["RBFGATE_TOKENS"]
    mount = mount_of("Deployment", "secret")
    [volume] = [volume for volume in pod("Deployment")["volumes"] if volume["name"] == mount["name"]]
    [generated] = yaml.safe_load((OVERLAY / "kustomization.yaml").read_text())["secretGenerator"]
    assert volume["secret"]["secretName"] == generated["name"]  # made by the overlay, never by the base
    assert generated["files"] == [posixpath.basename(tokens)]
    assert posixpath.dirname(tokens) == mount["mountPath"] and mount["readOnly"] is True
    assert "subPath" not in mount  # a subPath mount would never see an updated Secret
    assert tokens == serving_stage_environment()["RBFGATE_TOKENS"]


@pytest.mark.parametrize("kind", ["Deployment", "Job"])
def test_every_container_runs_unprivileged_on_a_read_only_root(kind):
    uid = next(stage for stage in dockerfile_stages() if stage.name == "serve").arguments("USER")[0].split(":")[0]
    assert pod(kind)["securityContext"]["runAsNonRoot"] is True
    assert pod(kind)["securityContext"]["runAsUser"] == int(uid)
    for each in pod(kind).get("initContainers", []) + pod(kind)["containers"]:
        context = each["securityContext"]
        assert context["runAsNonRoot"] is True and context["readOnlyRootFilesystem"] is True
        assert context["allowPrivilegeEscalation"] is False and context["capabilities"]["drop"] == ["ALL"]


@pytest.mark.parametrize("kind", ["Deployment", "Job"])
def test_the_temporary_directory_is_a_writable_volume(kind):
    temporary = serving_stage_environment()["TMPDIR"]  # where `rbfgate serve` puts the multiprocess metrics
    [mount] = [mount for mount in container(kind)["volumeMounts"] if mount["mountPath"] == temporary]
    [volume] = [volume for volume in pod(kind)["volumes"] if volume["name"] == mount["name"]]
    assert "emptyDir" in volume


@pytest.mark.parametrize("kind", ["Deployment", "Job"])
def test_every_container_has_cpu_and_memory_requests_and_limits(kind):
    for each in pod(kind).get("initContainers", []) + pod(kind)["containers"]:
        for bound in ("requests", "limits"):
            assert {"cpu", "memory"} <= set(each["resources"][bound]), (each["name"], bound)


def test_the_cpu_limit_gives_each_worker_a_core():
    limits = container("Deployment")["resources"]["limits"]
    assert cores(limits["cpu"]) >= int(settings_data()["RBFGATE_SERVE_WORKERS"])


def test_the_grace_period_covers_the_pre_stop_pause_and_the_drain():
    seconds = pod("Deployment")["terminationGracePeriodSeconds"]
    pause = int(container("Deployment")["lifecycle"]["preStop"]["exec"]["command"][-1])
    assert seconds > pause + 30  # `rbfgate serve` gives in-flight requests 30 s (service/commands.py)


def test_the_pods_wait_for_the_store_the_service_needs():
    [wait] = pod("Deployment")["initContainers"]
    assert SETTINGS_FILE in " ".join(wait["command"]) and "$RBFGATE_STORE" in " ".join(wait["command"])


def test_the_images_carry_the_project_version():
    project = installed_version("rbfgate")
    assert container("Deployment")["image"] == f"rbfgate:{project}"
    assert pod("Deployment")["initContainers"][0]["image"] == f"rbfgate:{project}"
    assert container("Job")["image"] == f"rbfgate-tools:{project}"


def test_the_service_and_the_budget_select_the_deployments_pods():
    labels = one("Deployment")["spec"]["template"]["metadata"]["labels"]
    service = one("Service")["spec"]
    [port] = service["ports"]
    assert service["selector"].items() <= labels.items()
    assert port["targetPort"] in {named["name"] for named in container("Deployment")["ports"]}
    assert one("PodDisruptionBudget")["spec"]["selector"]["matchLabels"].items() <= labels.items()
    assert one("Deployment")["spec"]["selector"]["matchLabels"].items() <= labels.items()


def test_the_autoscaler_scales_the_deployment_on_cpu():
    autoscaler = one("HorizontalPodAutoscaler")
    spec = autoscaler["spec"]
    [metric] = spec["metrics"]
    assert autoscaler["apiVersion"] == "autoscaling/v2"
    assert spec["scaleTargetRef"] == {"apiVersion": "apps/v1", "kind": "Deployment",
                                      "name": one("Deployment")["metadata"]["name"]}
    assert metric["type"] == "Resource" and metric["resource"]["name"] == "cpu"
    assert 2 <= spec["minReplicas"] <= spec["maxReplicas"]


def test_the_job_runs_the_publish_script_of_the_tools_image_with_the_variables_it_reads():
    job = container("Job")
    [installed] = [copy.split()[-1] for stage in dockerfile_stages() if stage.name == "tools"
                   for copy in stage.arguments("COPY") if "publish-bundle.sh" in copy]
    script = (KUBERNETES.parent / "publish-bundle.sh").read_text()
    assert job["command"] == [posixpath.basename(installed)] and installed.startswith("/usr/local/bin/")
    assert pod("Job")["restartPolicy"] == "Never"
    for entry in job["env"]:
        assert "${" + entry["name"] in script, entry["name"]
    [store] = [entry for entry in job["env"] if entry["name"] == "RBFGATE_STORE"]
    assert store["valueFrom"]["configMapKeyRef"] == {"name": one("ConfigMap")["metadata"]["name"], "key": "RBFGATE_STORE"}


def compose() -> dict:
    return yaml.safe_load(COMPOSE_FILE.read_text())


def test_compose_publishes_with_the_tools_image_before_the_service_starts():
    services = compose()["services"]
    assert services["publish"]["build"]["target"] == "tools" and services["serve"]["build"]["target"] == "serve"
    assert services["publish"]["command"] == [container("Job")["command"][0]]
    assert services["serve"]["depends_on"]["publish"]["condition"] == "service_completed_successfully"


def test_compose_shares_one_named_volume_for_the_store():
    document = compose()
    store = serving_stage_environment()["RBFGATE_STORE"]
    mounts = {name: service["volumes"] for name, service in document["services"].items()}
    assert mounts["publish"] == [f"store:{store}"] and f"store:{store}" in mounts["serve"]
    assert "store" in document["volumes"]


def test_compose_sets_only_variables_the_service_reads_and_exposes_its_port():
    serve = compose()["services"]["serve"]
    assert set(serve["environment"]) <= set(ENVIRON_KEYS.values())
    [published] = serve["ports"]
    assert re.fullmatch(r"127\.0\.0\.1:\d+:(\d+)", published).group(1) == serving_stage_environment()["RBFGATE_SERVE_PORT"]


@pytest.mark.parametrize("name", ["publish", "serve", "tokens-init", "tokens"])
def test_compose_runs_each_container_read_only_with_a_scratch_tmpfs(name):
    service = compose()["services"][name]
    assert service["read_only"] is True and service["tmpfs"] == [serving_stage_environment()["TMPDIR"]]
    assert service["cap_drop"] == ["ALL"] and "no-new-privileges:true" in service["security_opt"]


# The Kubernetes OpenAPI schemas as JSON Schema, one set per release, shipped inside the
# kubernetes-validate package (the `test` extra), so this runs offline and in CI. "Strict" schemas
# also refuse fields the API does not define, as `kubectl apply --validate=strict` does. Oldest
# release checked: 1.29 (every API version used here, such as autoscaling/v2 and policy/v1, is GA there).
_OLDEST_KUBERNETES = "1.29"


def _kubernetes_releases() -> list[str]:
    from kubernetes_validate.utils import latest_version

    return [_OLDEST_KUBERNETES, latest_version()]


@pytest.mark.parametrize("release", _kubernetes_releases())
@pytest.mark.parametrize(("file", "kind"), [(file, document["kind"]) for file, document in manifests()
                                            if document["kind"] != "Kustomization"])
def test_each_manifest_is_valid_against_the_kubernetes_schema(file, kind, release):
    from kubernetes_validate import ValidationError, validate

    [document] = [document for name, document in manifests() if (name, document["kind"]) == (file, kind)]
    try:
        validate(document, release, strict=True)
    except ValidationError as exc:
        pytest.fail(f"{file} ({kind}) is not a valid Kubernetes {release} object: {exc}")


def test_a_field_the_kubernetes_api_does_not_define_is_caught():
    # The check above can fail: a misspelt field in the Deployment is refused by the strict schema.
    from kubernetes_validate import ValidationError, validate

    deployment = one("Deployment")
    deployment["spec"]["replica"] = deployment["spec"].pop("replicas", 2)
    with pytest.raises(ValidationError):
        validate(deployment, _OLDEST_KUBERNETES, strict=True)


def test_the_kustomization_puts_every_manifest_into_one_namespace():
    # kustomize sets metadata.namespace of every namespaced object to the kustomization's namespace,
    # so no manifest may name another one, and the Namespace object is that namespace.
    kustomization = yaml.safe_load((KUBERNETES / "kustomization.yaml").read_text())
    namespace = kustomization["namespace"]
    assert one("Namespace")["metadata"]["name"] == namespace == "rbfgate"
    named = {document["metadata"].get("namespace") for _, document in manifests()
             if document["kind"] not in ("Namespace", "Kustomization")}
    assert named <= {None, namespace}, named
