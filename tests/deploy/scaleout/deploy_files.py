"""Readers for the files in deploy/: Dockerfile stages, Kubernetes manifests, the compose file,
and the route table of the real app, so tests compare the files with what the code uses.
"""

from __future__ import annotations

import shlex
from dataclasses import dataclass, field
from pathlib import Path

import yaml

__all__ = [
    "COMPOSE_FILE",
    "DEPLOY",
    "DOCKERFILE",
    "KUBERNETES",
    "OVERLAY",
    "REPOSITORY",
    "Stage",
    "app_routes",
    "dockerfile_stages",
    "manifests",
    "one",
]

REPOSITORY = Path(__file__).resolve().parents[3]
DEPLOY = REPOSITORY / "deploy"
DOCKERFILE = DEPLOY / "Dockerfile"
KUBERNETES = DEPLOY / "kubernetes"
OVERLAY = DEPLOY / "overlays" / "example"
COMPOSE_FILE = DEPLOY / "compose.yaml"


@dataclass
class Stage:
    """One ``FROM ... AS name`` stage: its base and its instructions as (KEYWORD, argument text)."""

    name: str
    base: str
    instructions: list[tuple[str, str]] = field(default_factory=list)

    def arguments(self, keyword: str) -> list[str]:
        return [text for word, text in self.instructions if word == keyword]

    def environment(self) -> dict[str, str]:
        """ENV KEY=VALUE pairs set in this stage (the ``KEY=VALUE`` form only)."""
        values = {}
        for text in self.arguments("ENV"):
            for word in shlex.split(text):
                key, _, value = word.partition("=")
                values[key] = value
        return values


def dockerfile_stages(path: Path = DOCKERFILE) -> list[Stage]:
    """The stages in file order. Joins ``\\`` continuations and drops comment lines (Dockerfile reference)."""
    stages: list[Stage] = []
    logical = ""
    for raw in path.read_text().splitlines():
        line = raw.strip()
        if not logical and (not line or line.startswith("#")):
            continue
        if line.startswith("#"):
            continue  # a comment inside a continued instruction
        if line.endswith("\\"):
            logical += line[:-1] + " "
            continue
        logical += line
        keyword, _, rest = logical.partition(" ")
        logical = ""
        keyword = keyword.upper()
        if keyword == "FROM":
            words = rest.split()
            name = words[2] if len(words) >= 3 and words[1].upper() == "AS" else str(len(stages))
            stages.append(Stage(name=name, base=words[0]))
        elif stages:
            stages[-1].instructions.append((keyword, rest.strip()))
    return stages


def manifests() -> list[tuple[str, dict]]:
    """(file name, document) for every non-empty YAML document under deploy/kubernetes."""
    found = []
    for path in sorted(KUBERNETES.glob("*.yaml")):
        with path.open() as handle:
            found.extend((path.name, document) for document in yaml.safe_load_all(handle) if document)
    return found


def one(kind: str) -> dict:
    """The single manifest of ``kind`` (fails if there is none or more than one)."""
    [document] = [document for _, document in manifests() if document.get("kind") == kind]
    return document


def app_routes(tmp_path: Path) -> set[tuple[str, str]]:
    """(method, path template) of every route of the app ``rbfgate serve`` runs (an empty store)."""
    from model_store.store import Store
    from service.app import create_app
    from service.settings import Settings

    store = Store(tmp_path / "routes-store", create=True)
    app = create_app(Settings(store_root=store.root), store=store, environ={}, write_log=lambda event: None)
    return {(method, route.path) for route in app.routes for method in getattr(route, "methods", ())}
