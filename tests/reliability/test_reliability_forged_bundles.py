"""Forged bundles: every class of lie a bundle file can tell costs a bounded amount and ends in one line.

The classes (tests/reliability/forgery.py): duplicate member names at any depth, nesting 100,000
levels deep, lone surrogates, an oversized manifest, .npy headers with negative, overflowing,
wrapping or over-promising dimensions or a deeply nested header literal, an array file larger
than its manifest entry, sparse tar members and a tar member longer than the archive. Each is
refused by ``rbfgate verify`` with exit 2 and a single line on stderr (never a traceback), without
the process growing past a generous bound; placed in a store, pinned scoring, the bundle download
and activation answer problem details (never 5xx). A version folder changed after publishing fails
the store's verification, and while it does the store refuses every change to the model without
writing anything, so the evidence stays as found (README, "History format"); a forged array under
an intact manifest is refused by the activation's own checks and recorded as ``refused-activate``.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from http_api.cases import assert_problem, bearer
from http_api.conftest import make_client, tokens  # noqa: F401  (fixtures used below)
from store_support import python_env

from .forgery import ARCHIVE_FORGERIES, DIRECTORY_FORGERIES

# A generous functional bound on the verifying process (the interpreter with numpy and pydantic is
# about 55 MB here): the sparse member made it 4.2 GB before the fix. Not a speed or size target.
_RESIDENT_BOUND_KIB = 256 * 1024
# VmHWM, the peak resident size of this process image (proc(5)); getrusage's ru_maxrss would also
# count the pytest process it was forked from, since Linux carries the maximum across exec.
_VERIFY_AND_REPORT = (
    "import re, sys\n"
    "from model_store.cli import main\n"
    "code = main(['verify', sys.argv[1]])\n"
    "status = open('/proc/self/status').read()\n"
    "print(re.search(r'VmHWM:\\s+(\\d+) kB', status).group(1), file=sys.stderr)\n"
    "sys.exit(code)\n"
)


def _verify(path: Path) -> tuple[int, list[str], int]:
    """(exit code, stderr lines of the command, peak resident KiB) of ``rbfgate verify PATH``."""
    result = subprocess.run([sys.executable, "-c", _VERIFY_AND_REPORT, str(path)], capture_output=True, text=True,
                            env=python_env(), timeout=120)
    *lines, peak = result.stderr.strip().splitlines()
    return result.returncode, lines, int(peak)


def _copy(service_models, tmp_path: Path) -> Path:
    return Path(shutil.copytree(service_models.iris2.bundle.source, tmp_path / "bundle"))


@pytest.mark.parametrize("forgery", sorted(DIRECTORY_FORGERIES))
def test_a_forged_bundle_directory_is_refused_in_one_line(service_models, tmp_path, forgery):
    bundle = _copy(service_models, tmp_path)
    DIRECTORY_FORGERIES[forgery](bundle)
    code, lines, peak = _verify(bundle)
    assert code == 2, lines
    assert len(lines) == 1 and lines[0].startswith("rbfgate verify: error: "), lines
    assert peak < _RESIDENT_BOUND_KIB


@pytest.mark.parametrize("forgery", sorted(ARCHIVE_FORGERIES))
def test_a_forged_bundle_archive_is_refused_in_one_line_and_bounded_memory(service_models, tmp_path, forgery):
    archive = tmp_path / "bundle.tar"
    ARCHIVE_FORGERIES[forgery](Path(service_models.iris2.bundle.source), archive)
    code, lines, peak = _verify(archive)
    assert code == 2, lines
    assert len(lines) == 1 and lines[0].startswith("rbfgate verify: error: "), lines
    assert peak < _RESIDENT_BOUND_KIB, f"verify of a {archive.stat().st_size}-byte archive peaked at {peak} KiB"


# The store-level checks run one forgery of each kind of file (manifest, .npy header, array size):
# the store reads bundles with the same reader, so the other classes take the same path.
_ARRAY_ONLY = "array file larger than the manifest says"  # the only one that leaves the manifest as published
_IN_STORE = ["objects nested 100,000 deep", "duplicate top-level name", "npy negative dimension",
             "npy dimensions whose int64 product wraps", _ARRAY_ONLY]


@pytest.fixture
def forged_store(tmp_path, service_models):
    """A store with iris 1.0.0 active and iris 2.0.0 published; returns a function that forges 2.0.0."""
    from http_api.conftest import build_store

    store = build_store(tmp_path / "store", service_models)

    def forge(name: str) -> None:
        DIRECTORY_FORGERIES[name](store.bundle_dir("iris", "2.0.0"))

    return store, forge


@pytest.mark.parametrize("forgery", _IN_STORE)
def test_pinned_scoring_of_a_forged_version_is_a_409_problem(make_client, forged_store, forgery):  # noqa: F811
    store, forge = forged_store
    forge(forgery)
    client = make_client(store.root)
    record = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}
    body = assert_problem(client.post("/score/iris/versions/2.0.0", json={"records": [record]}), 409)
    assert "2.0.0" in body["detail"]


@pytest.mark.parametrize("forgery", _IN_STORE)
def test_downloading_a_forged_version_is_a_409_problem(make_client, forged_store, tokens, forgery):  # noqa: F811
    store, forge = forged_store
    forge(forgery)
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    assert_problem(client.get("/models/iris/versions/2.0.0/bundle", headers=bearer(issued["audit"])), 409)


@pytest.mark.parametrize("forgery", _IN_STORE)
def test_activating_a_forged_version_is_refused_and_changes_nothing(make_client, forged_store, tokens, forgery):  # noqa: F811
    store, forge = forged_store
    before = store.history("iris")
    forge(forgery)
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                           json={"version": "2.0.0", "reason": "forged"})
    assert "2.0.0" in assert_problem(response, 409)["detail"]
    after = store.history("iris")
    if forgery == _ARRAY_ONLY:
        # The manifest, and so the digest recorded at publish, is intact: the folder still verifies,
        # the activation's own check fails, and the store records the refusal.
        assert after[:-1] == before and (after[-1]["action"], after[-1]["version"]) == ("refused-activate", "2.0.0")
    else:  # the manifest changed: the folder no longer matches its publish entry, nothing is written
        assert after == before
    assert store.active("iris").version == "1.0.0"
    record = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}
    answer = client.post("/score/iris", json={"records": [record]}, headers=bearer(issued["score"]))
    assert answer.json()["version"] == "1.0.0", answer.text
