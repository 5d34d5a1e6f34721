"""Helpers for the store tests: small iris models, bundles, raw store files, subprocess runs.

Not a conftest (a second ``conftest`` module would shadow ``from conftest import ...`` elsewhere);
bundles are made with the ``bundle_factory`` fixture from tests/conftest.py.

Iris: R. A. Fisher, "The use of multiple measurements in taxonomic problems", 1936 (UCI Iris, shipped
with scikit-learn).
"""

from __future__ import annotations

import functools
import hashlib
import io
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.store import Store

REPO = Path(__file__).resolve().parents[2]
FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
RFC3339_UTC = r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z"  # RFC 3339 section 5.6 date-time, "Z" offset


@functools.lru_cache(maxsize=None)
def iris_model(C: float = 1.0):
    """A StandardScaler + RBF SVC fitted on all of iris; returns (model, X (150, 4), y (150,))."""
    X, y = load_iris(return_X_y=True)
    return make_pipeline(StandardScaler(), SVC(C=C)).fit(X, y), X, y


def iris_bundle(bundle_factory, version: str, *, C: float = 1.0, margin: float = 0.05, name: str = "iris") -> Path:
    """Export an iris model as bundle ``name`` ``version``; different ``C`` gives different content."""
    model, X, y = iris_model(C)
    bundle = bundle_factory(model, X, y=y, name=name, version=version, features=FEATURES, margin=margin)
    return Path(bundle.source)


def two_releases(root: Path, bundle_factory) -> Store:
    """A new store at ``root`` with four entries: publish 1.0.0 and 1.1.0, activate 1.0.0, then 1.1.0."""
    store = Store(root, create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0", C=1.0), actor="publisher")
    store.publish(iris_bundle(bundle_factory, "1.1.0", C=2.0), actor="publisher")
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    store.activate("iris", "1.1.0", reason="more recall", actor="alice")
    return store


def trail_lines(store, name: str) -> list[bytes]:
    """The raw lines of a model's history file (without newlines)."""
    return store.layout.history(name).read_bytes().splitlines()


def write_trail_lines(store, name: str, lines: list[bytes]) -> None:
    store.layout.history(name).write_bytes(b"".join(line + b"\n" for line in lines))


def rehash(entry: dict) -> dict:
    """What a forger who knows the format would do: recompute the entry's hash (FIPS 180-4 SHA-256 over
    the canonical JSON: sorted keys, no spaces, UTF-8, as documented in model_store/store/history.py)."""
    body = {key: value for key, value in entry.items() if key != "hash"}
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")
    return {**body, "hash": hashlib.sha256(canonical).hexdigest()}


def encode(entry: dict) -> bytes:
    return json.dumps(entry, sort_keys=True).encode("utf-8")


def strip_via(store, name: str) -> list[bytes]:
    """Rewrite the trail as rbfgate wrote it before ``via`` existed: the same entries without it, chained anew."""
    previous = "0" * 64  # the prev_hash of a first entry (README, history format)
    lines = []
    for line in trail_lines(store, name):
        entry = {key: value for key, value in json.loads(line).items() if key != "via"}
        entry = rehash({**entry, "prev_hash": previous})
        previous = entry["hash"]
        lines.append(json.dumps(entry, sort_keys=True).encode("utf-8"))
    write_trail_lines(store, name, lines)
    pointer_path = store.layout.pointer(name)
    pointer = json.loads(pointer_path.read_text())
    pointer["history_head"] = previous
    pointer_path.write_text(json.dumps(pointer))
    return lines


def tree_snapshot(root: Path) -> dict[str, str]:
    """Relative path -> SHA-256 of every file under ``root`` (to show that nothing changed)."""
    return {
        str(path.relative_to(root)): hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(Path(root).rglob("*"))
        if path.is_file()
    }


def flip_byte(path: Path, offset_from_end: int = 8) -> None:
    """Corrupt one byte near the end of a file (inside the array data of a .npy file)."""
    data = bytearray(path.read_bytes())
    data[-offset_from_end] ^= 0xFF
    path.write_bytes(bytes(data))


def break_golden_vectors(bundle_dir: Path) -> dict:
    """Negate ``dual_coef.npy`` and rewrite its checksum in the manifest, which is returned.

    Every file still matches its checksum; only the golden self-test can tell, because every
    pairwise decision changes sign (the decision function is linear in the dual coefficients).
    """
    dual = np.load(bundle_dir / "dual_coef.npy")
    buffer = io.BytesIO()
    np.save(buffer, -dual, allow_pickle=False)
    (bundle_dir / "dual_coef.npy").write_bytes(buffer.getvalue())
    manifest = json.loads((bundle_dir / "manifest.json").read_text())
    manifest["files"]["dual_coef.npy"]["sha256"] = hashlib.sha256(buffer.getvalue()).hexdigest()
    (bundle_dir / "manifest.json").write_text(json.dumps(manifest))
    return manifest


def python_env(**extra: str) -> dict[str, str]:
    env = {key: value for key, value in os.environ.items() if key != "RBFGATE_STORE"}
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    env.update(extra)
    return env


def run_cli(*args: str, env: dict[str, str] | None = None, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """Run ``python -m model_store ARGS`` in a fresh interpreter (bounded to 120 s)."""
    return subprocess.run(
        [sys.executable, "-m", "model_store", *args],
        capture_output=True, text=True, env=env or python_env(), cwd=cwd, timeout=120,
    )


def start_python(script: str, *args: str) -> subprocess.Popen:
    """Start ``python -c script args`` with the repository importable."""
    return subprocess.Popen(
        [sys.executable, "-c", script, *args],
        env=python_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )


def wait_until(predicate, what: str, limit_seconds: float = 60.0) -> None:
    """Poll ``predicate`` (bounded); a helper for synchronising with subprocesses, not a timing assertion."""
    deadline = time.monotonic() + limit_seconds
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(0.02)


def decision_rows(bundle_dirs: list[Path]) -> np.ndarray:
    """The golden inputs of the given bundles stacked, in their order, (n, 4) raw units."""
    rows = []
    for path in bundle_dirs:
        manifest = json.loads((path / "manifest.json").read_text())
        rows.extend(manifest["golden"]["inputs"])
    return np.asarray(rows, dtype=np.float64)


def store_with(root: Path, bundles, active: str) -> Store:
    """A new store at ``root`` with every bundle published and version ``active`` of each model activated."""
    store = Store(root, create=True)
    for bundle in bundles:
        store.publish(bundle.source, actor="publisher")
    for name in sorted({bundle.name for bundle in bundles}):
        store.activate(name, active, reason="first release", actor="alice")
    return store


def killed_before_the_pointer(monkeypatch, change) -> None:
    """Run ``change()`` as a command killed after it appended its entries and before it moved the pointer."""
    import pytest

    from model_store.store import recovery

    def killed(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(recovery, "write_pointer", killed)
    with pytest.raises(KeyboardInterrupt):
        change()
    monkeypatch.undo()
