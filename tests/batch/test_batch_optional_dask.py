"""Dask is an optional extra: the core import path, the CLI and the serving app never load it.

Checked in a fresh interpreter (sys.modules lists every module imported), and in the serving
image's build recipe (deploy/Dockerfile installs the ``serve`` extra only; pyproject.toml
keeps Dask in the ``batch`` extra).
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]

_SCRIPT = textwrap.dedent(
    """
    import sys
    import model_store
    from model_store.cli import build_parser
    from model_store.batch_scoring import score_file
    import service.app
    build_parser().parse_args(["score", "b", "in.csv", "--out", "o.csv", "--engine", "dask"])
    print("LOADED", sorted({name.split(".")[0] for name in sys.modules} & {"dask", "distributed", "dask_expr"}))
    """
)


def test_core_cli_and_service_import_no_dask():
    result = subprocess.run([sys.executable, "-c", _SCRIPT], capture_output=True, text=True, timeout=120, cwd=REPO)
    assert result.returncode == 0, result.stderr
    assert "LOADED []" in result.stdout


def test_dask_lives_in_the_batch_extra_only():
    project = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]
    def mentions_dask(requirements):
        return any(requirement.split("[")[0].split(">")[0].strip() in ("dask", "distributed")
                   for requirement in requirements)
    assert not mentions_dask(project["dependencies"])
    extras = project["optional-dependencies"]
    assert mentions_dask(extras["batch"])
    assert not mentions_dask(extras["serve"]) and "batch" not in " ".join(extras["serve"])
    serving_install = [line for line in (REPO / "deploy" / "Dockerfile").read_text().splitlines()
                       if "pip install" in line and "[serve]" in line]
    assert serving_install and all("batch" not in line for line in serving_install)
    guard = [line for line in (REPO / "deploy" / "Dockerfile").read_text().splitlines() if "find_spec" in line]
    assert guard and "'dask'" in guard[0] and "'distributed'" in guard[0]  # the image build fails if one slips in
