"""Where a store keeps what, how it is found, and its settings file.

    STORE/
      rbfgate-store.json              store settings: kind, creation time, trusted signing keys, trust trail head
      trust.jsonl                     the hash-chained trail of trust changes (trust-add, trust-remove)
      lock                            flock target that serialises every change
      staging/                        work area of publish and prune; emptied by the next change
      models/NAME/
        active.json                   the active pointer (version, digest, history head)
        history.jsonl                 the hash-chained trail, one JSON entry per line
        versions/VERSION/
          published.json              who published it, when, its digest and publish sequence
          bundle/                     the bundle as published (manifest.json, *.npy, signature.json)

A version directory appears by one rename of a complete, fsynced staging
directory, so a reader either sees all of it or none of it.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from model_store.errors import NotFoundError, StoreError
from model_store.naming import check_name
from model_store.store.durable import TEMP_PREFIX, atomic_write
from model_store.store.files import read_store_file
from model_store.store.history import GENESIS

__all__ = [
    "SETTINGS_FILE",
    "STORE_KIND",
    "StoreLayout",
    "default_store_root",
    "model_names",
    "open_layout",
    "read_settings",
    "require_model",
    "resolve_store_root",
    "version_names",
    "write_settings",
]

SETTINGS_FILE = "rbfgate-store.json"
STORE_KIND = "rbfgate-store/1"
ENVIRONMENT_VARIABLE = "RBFGATE_STORE"


@dataclass(frozen=True)
class StoreLayout:
    """The paths of one store; names are checked before they become path components."""

    root: Path

    @property
    def settings(self) -> Path:
        return self.root / SETTINGS_FILE

    @property
    def trust_trail(self) -> Path:
        return self.root / "trust.jsonl"

    @property
    def lock(self) -> Path:
        return self.root / "lock"

    @property
    def staging(self) -> Path:
        return self.root / "staging"

    @property
    def models(self) -> Path:
        return self.root / "models"

    def model(self, name: str) -> Path:
        return self.models / check_name(name, what="model name")

    def versions(self, name: str) -> Path:
        return self.model(name) / "versions"

    def version(self, name: str, version: str) -> Path:
        return self.versions(name) / check_name(version, what="model version")

    def bundle(self, name: str, version: str) -> Path:
        return self.version(name, version) / "bundle"

    def record(self, name: str, version: str) -> Path:
        return self.version(name, version) / "published.json"

    def history(self, name: str) -> Path:
        return self.model(name) / "history.jsonl"

    def pointer(self, name: str) -> Path:
        return self.model(name) / "active.json"


def model_names(layout: StoreLayout) -> list[str]:
    """Sorted names of the models that have at least one stored version."""
    try:
        names = os.listdir(layout.models)
    except FileNotFoundError:
        return []
    except OSError as exc:
        raise StoreError(f"{layout.models}: cannot list models: {exc.strerror}") from exc
    return sorted(name for name in names if not name.startswith(".") and version_names(layout, name))


def version_names(layout: StoreLayout, name: str) -> list[str]:
    """Sorted names of the stored versions of ``name``; none when the model does not exist."""
    try:
        return sorted(entry for entry in os.listdir(layout.versions(name)) if not entry.startswith("."))
    except (FileNotFoundError, NotADirectoryError):
        return []
    except OSError as exc:
        raise StoreError(f"{layout.versions(name)}: cannot list versions: {exc.strerror}") from exc


def require_model(layout: StoreLayout, name: str) -> None:
    """Raise ``NotFoundError`` (listing the models there are) unless the store holds model ``name``."""
    if not layout.model(name).is_dir():
        raise NotFoundError(f"no model {name!r} in the store {layout.root}; models: {model_names(layout) or 'none'}")


def default_store_root(environ: Mapping[str, str]) -> Path:
    """``$XDG_DATA_HOME/rbfgate/store``, else ``$HOME/.local/share/rbfgate/store``."""
    data_home = environ.get("XDG_DATA_HOME", "").strip()
    if data_home:
        return Path(data_home) / "rbfgate" / "store"
    home = environ.get("HOME", "").strip()
    if not home:
        raise StoreError(
            "no store given: pass --store DIR or set RBFGATE_STORE (HOME and XDG_DATA_HOME are unset, "
            "so there is no default location)"
        )
    return Path(home) / ".local" / "share" / "rbfgate" / "store"


def resolve_store_root(cli_value: str | None, environ: Mapping[str, str]) -> Path:
    """``--store DIR``, else ``$RBFGATE_STORE``, else ``default_store_root(environ)``."""
    if cli_value:
        return Path(cli_value)
    from_environment = environ.get(ENVIRONMENT_VARIABLE, "").strip()
    if from_environment:
        return Path(from_environment)
    return default_store_root(environ)


def open_layout(root: Path, *, create: bool, created_at: str) -> StoreLayout:
    """Check that ``root`` is a store (or make one when ``create`` and it is missing or empty)."""
    root = Path(root)
    layout = StoreLayout(root)
    if not root.exists():
        if not create:
            raise StoreError(
                f"{root}: no store here (the directory does not exist); check --store or RBFGATE_STORE, "
                "or publish a bundle to create a store"
            )
        try:
            root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{root}: cannot create the store directory: {exc.strerror}") from exc
    if not root.is_dir():
        raise StoreError(f"{root}: not a directory; a store is a directory, pass another --store")
    try:
        entries = [entry for entry in os.listdir(root) if not entry.startswith(TEMP_PREFIX)]
    except OSError as exc:
        raise StoreError(f"{root}: cannot read the store directory: {exc.strerror}") from exc
    if SETTINGS_FILE in entries:
        read_settings(layout)
        return layout
    if entries:
        shown = ", ".join(sorted(entries)[:3]) + (", ..." if len(entries) > 3 else "")
        raise StoreError(
            f"{root}: holds files ({shown}) but no {SETTINGS_FILE}, so it is not an rbfgate store; "
            "pass an empty or new directory as --store"
        )
    if not create:
        raise StoreError(f"{root}: empty directory, not a store yet; publish a bundle to create a store here")
    try:
        write_settings(layout, {"kind": STORE_KIND, "created": created_at, "trusted_keys": [],
                                "trust_head": GENESIS, "trust_seq": 0})
    except OSError as exc:
        raise StoreError(f"{root}: cannot create the store: {exc.strerror}") from exc
    return layout


def read_settings(layout: StoreLayout) -> dict[str, Any]:
    """The settings document, checked to be ours."""
    path = layout.settings
    data = read_store_file(layout.root, path)  # StoreError (UnsafeStoreEntry) for a link or a FIFO
    if data is None:
        raise StoreError(f"{path}: the store settings are missing; restore them from a backup")
    try:
        document = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise StoreError(f"{path}: the store settings are not valid JSON ({exc}); restore them from a backup") from exc
    if not isinstance(document, dict) or document.get("kind") != STORE_KIND:
        raise StoreError(
            f"{path}: not rbfgate store settings (expected \"kind\": \"{STORE_KIND}\"); "
            "this directory belongs to something else, pass another --store"
        )
    if not isinstance(document.get("trusted_keys", []), list):
        raise StoreError(f"{path}: \"trusted_keys\" must be a list; restore the settings from a backup")
    return document


def write_settings(layout: StoreLayout, document: dict[str, Any]) -> None:
    text = json.dumps(document, indent=2, sort_keys=True, ensure_ascii=False)
    atomic_write(layout.settings, (text + "\n").encode("utf-8"))
