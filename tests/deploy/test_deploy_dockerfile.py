"""deploy/Dockerfile, read statically (no container engine runs on the test machines).

Checked against the code it packages: the extras in pyproject.toml and their installed
dependency metadata (PEP 508 requirements, read with ``packaging``), the environment variables
``rbfgate serve`` reads (service.settings.ENVIRON_KEYS) and the routes of the real app.
Instruction syntax: the Dockerfile reference (FROM ... AS, USER, HEALTHCHECK CMD, exec form).
"""

from __future__ import annotations

import json
import re
import shlex
import tomllib
from importlib.metadata import PackageNotFoundError, requires

import pytest
from packaging.requirements import Requirement
from packaging.utils import canonicalize_name
from scaleout.deploy_files import DEPLOY, DOCKERFILE, REPOSITORY, app_routes, dockerfile_stages

from model_store.cli import build_parser
from service.settings import ENVIRON_KEYS

TRAINING_PACKAGES = {"scikit-learn", "joblib", "scipy"}  # what `[train]` adds; never on the serving path


def stage(name: str):
    [found] = [candidate for candidate in dockerfile_stages() if candidate.name == name]
    return found


def lineage(name: str) -> list:
    """The stage and the stages it is built FROM, nearest first."""
    stages = {candidate.name: candidate for candidate in dockerfile_stages()}
    chain = [stages[name]]
    while chain[-1].base in stages:
        chain.append(stages[chain[-1].base])
    return chain


def pip_installs(name: str) -> list[str]:
    """The argument text of every ``pip install`` run while building stage ``name`` (and its bases)."""
    commands = []
    for ancestor in lineage(name):
        for run in ancestor.arguments("RUN"):
            commands += [part.split("pip install", 1)[1] for part in run.split("&&") if "pip install" in part]
    return commands


def pyproject() -> dict:
    return tomllib.loads((REPOSITORY / "pyproject.toml").read_text())


@pytest.fixture(scope="module")
def routes(tmp_path_factory) -> set[tuple[str, str]]:
    """(method, path) of every route of the real app."""
    return app_routes(tmp_path_factory.mktemp("routes"))

def test_the_serving_image_is_the_default_target():
    assert dockerfile_stages()[-1].name == "serve"  # `docker build` without --target builds the last stage


def test_the_serving_stage_runs_as_a_non_root_user_it_creates():
    [user] = stage("serve").arguments("USER")
    uid = user.split(":")[0]
    created = " ".join(run for ancestor in lineage("serve") for run in ancestor.arguments("RUN"))
    assert uid.isdigit() and int(uid) != 0  # numeric, so Kubernetes' runAsNonRoot can verify it
    assert f"--uid {uid}" in created


def test_the_health_check_asks_healthz_with_python(routes):
    [check] = stage("serve").arguments("HEALTHCHECK")
    command = json.loads(check.split(" CMD ", 1)[1])  # exec form: a JSON array
    assert command[0] == "python" and "/healthz" in command[-1] and "curl" not in check
    assert ("GET", "/healthz") in routes


def test_the_health_check_uses_the_port_the_service_listens_on():
    [check] = stage("serve").arguments("HEALTHCHECK")
    environment = stage("serve").environment()
    assert "os.environ['RBFGATE_SERVE_PORT']" in check and "RBFGATE_SERVE_PORT" in environment
    assert environment["RBFGATE_SERVE_PORT"] in " ".join(stage("serve").arguments("EXPOSE")).split()


def test_the_serving_stage_installs_the_serve_extra_and_nothing_for_training():
    installs = pip_installs("serve")
    assert installs and all("[serve]" in text for text in installs)
    for text in installs:
        assert "[train]" not in text and not any(package in text for package in (*TRAINING_PACKAGES, "sklearn"))


def test_the_serving_stage_fails_its_build_if_a_training_package_is_importable():
    guards = [run for run in stage("serve").arguments("RUN") if "find_spec" in run]
    assert guards and all(module in guards[0] for module in ("sklearn", "joblib", "scipy"))


def test_the_serve_extra_pulls_in_no_training_package_even_indirectly():
    project = pyproject()["project"]
    top = [Requirement(text) for text in project["dependencies"] + project["optional-dependencies"]["serve"]]
    wanted = [requirement for requirement in top if requirement.marker is None or requirement.marker.evaluate()]
    seen: set[str] = set()
    while wanted:
        requirement = wanted.pop()
        name = canonicalize_name(requirement.name)
        if name in seen:
            continue
        seen.add(name)
        try:
            metadata = requires(requirement.name) or []
        except PackageNotFoundError:
            # The test environment installs the serve extra, so every requirement must be there to be read.
            pytest.fail(f"{requirement.name} is required by the serve extra but not installed; cannot follow it")
        for text in metadata:
            child = Requirement(text)
            if child.marker is None or child.marker.evaluate({"extra": ""}):  # no extras: what pip installs
                wanted.append(child)
    assert not seen & TRAINING_PACKAGES, sorted(seen & TRAINING_PACKAGES)
    # Reached only through the packages' own metadata (FastAPI needs Starlette, pydantic its core,
    # uvicorn h11): proof that the walk followed the dependencies rather than the list it started from.
    assert {"starlette", "pydantic-core", "h11"} <= seen, sorted(seen)


def test_the_tools_stage_installs_the_train_extra():
    installs = pip_installs("tools")
    assert installs and all("[train]" in text for text in installs)
    assert set(pyproject()["project"]["optional-dependencies"]) >= {"serve", "train"}


def test_the_serving_command_is_rbfgate_serve():
    [command] = stage("serve").arguments("CMD")
    assert json.loads(command) == ["rbfgate", "serve"]
    assert "serve" in build_parser()._subparsers._group_actions[0].choices


def test_every_rbfgate_variable_the_image_sets_is_one_the_service_reads():
    names = {name for ancestor in lineage("serve") for name in ancestor.environment() if name.startswith("RBFGATE_")}
    assert names and names <= set(ENVIRON_KEYS.values()), names - set(ENVIRON_KEYS.values())
    assert {"RBFGATE_STORE", "RBFGATE_TOKENS", "RBFGATE_SERVE_WORKERS"} <= names


def test_the_serving_image_gives_each_worker_one_blas_thread():
    # common practice: one worker process per core, so BLAS must not start a thread per core as well
    environment = stage("serve").environment()
    assert environment["OPENBLAS_NUM_THREADS"] == environment["OMP_NUM_THREADS"] == "1"


def test_the_store_mount_point_belongs_to_the_service_user():
    store = stage("base").environment()["RBFGATE_STORE"]
    [user] = stage("serve").arguments("USER")
    setup = " ".join(stage("base").arguments("RUN"))
    assert f"mkdir -p {store}" in setup
    assert re.search(rf"chown -R {re.escape(user)} {re.escape(store.rsplit('/', 1)[0])}(\s|$)", setup)


def test_the_build_context_admits_every_file_the_dockerfile_copies():
    ignore = (DEPLOY / "Dockerfile.dockerignore").read_text().splitlines()
    admitted = {line[1:].rstrip("/") for line in ignore if line.startswith("!")}
    sources = []
    for ancestor in dockerfile_stages():
        for copy in ancestor.arguments("COPY"):
            words = [word for word in shlex.split(copy) if not word.startswith("--")]
            if "--from=" not in copy:
                sources += [word.rstrip("/") for word in words[:-1]]
    assert sources and set(sources) <= admitted, set(sources) - admitted
    assert all((REPOSITORY / source).exists() for source in sources)


@pytest.mark.parametrize("name", ["wheel", "base", "tools", "serve"])
def test_every_stage_starts_from_the_slim_python_image_or_another_stage(name):
    first_line = next(line for line in DOCKERFILE.read_text().splitlines() if line.startswith("ARG PYTHON_IMAGE="))
    assert re.fullmatch(r"ARG PYTHON_IMAGE=python:3\.1[1-9]-slim(-\w+)?", first_line)
    assert stage(name).base in {"${PYTHON_IMAGE}", "base"}
