"""Generating a typed client with openapi-python-client (a generator of the OpenAPI community, not
ours) from a document, and importing it, as a backend team would."""

from __future__ import annotations

import importlib
import json
import subprocess
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import ModuleType

__all__ = ["generated_client"]


@contextmanager
def generated_client(document: dict, workdir: Path, package: str) -> Iterator[ModuleType]:
    """The package generated from ``document`` in ``workdir``, imported; fails on any generator warning."""
    (workdir / "document.json").write_text(json.dumps(document))
    (workdir / "config.json").write_text(json.dumps({"package_name_override": package, "post_hooks": []}))
    completed = subprocess.run(
        [sys.executable, "-m", "openapi_python_client", "generate", "--path", str(workdir / "document.json"),
         "--meta", "none", "--config", str(workdir / "config.json"), "--output-path", str(workdir / package),
         "--fail-on-warning"],
        capture_output=True, text=True, timeout=300,
    )
    # --fail-on-warning: a schema the generator could not turn into a type (and so left out, with
    # every type using it) is a failure, not a warning on stderr.
    assert completed.returncode == 0, completed.stdout + completed.stderr
    assert "Warning" not in completed.stdout + completed.stderr, completed.stdout + completed.stderr
    sys.path.insert(0, str(workdir))
    try:
        yield importlib.import_module(package)
    finally:
        sys.path.remove(str(workdir))
        for name in [name for name in sys.modules if name == package or name.startswith(package + ".")]:
            del sys.modules[name]
