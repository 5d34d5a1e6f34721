"""Scoring with a version from the store: the active one, a given one, or the one live at a time.

"Live at a time" is the activation stack of the model's history up to that time (the
undo-stack semantics of activate and rollback documented in model_store/store/state.py);
times are RFC 3339 (section 5.6). Models: RBF SVCs on iris, shipped with scikit-learn
(R. A. Fisher, 1936), fitted with different C so that versions differ in content.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.cli import main
from model_store.store import Store

from .conftest import FEATURES, iris_table, write_csv

_START = datetime(2026, 11, 1, 8, 0, 0, tzinfo=timezone.utc)


class _Clock:
    def __init__(self):
        self.now = _START

    def __call__(self):
        return self.now


@pytest.fixture
def store_with_history(tmp_path, bundle_factory):
    """Versions 1.0.0, 1.1.0, 1.2.0; activated on Nov 1, Nov 10 and Nov 20, rolled back on Nov 25."""
    X, y = load_iris(return_X_y=True)
    clock = _Clock()
    store = Store(tmp_path / "store", create=True, clock=clock)
    digests = {}
    for version, C in (("1.0.0", 1.0), ("1.1.0", 3.0), ("1.2.0", 10.0)):
        model = make_pipeline(StandardScaler(), SVC(C=C)).fit(X, y)
        bundle = bundle_factory(model, X, y=y, name="iris", version=version, features=FEATURES)
        store.publish(Path(bundle.source), actor="publisher")
        digests[version] = bundle.digest
    for day, version in ((0, "1.0.0"), (9, "1.1.0"), (19, "1.2.0")):
        clock.now = _START + timedelta(days=day)
        store.activate("iris", version, reason="release", actor="alice")
    clock.now = _START + timedelta(days=24)
    store.rollback("iris", reason="complaints", actor="alice")
    source = write_csv(tmp_path / "in.csv", iris_table(X, 20))
    return store, digests, source


def _score_from_store(store, source, out, *extra) -> int:
    return main(["score", "--store", str(store.root), "--model", "iris", str(source), "--out", str(out), *extra])


def _sidecar(out: Path) -> dict:
    return json.loads(out.with_name(out.name + ".json").read_text())


@pytest.mark.parametrize("moment, version", [
    ("2026-11-01T08:00:00Z", "1.0.0"),        # the second of the first activation
    ("2026-11-05T12:00:00+01:00", "1.0.0"),
    ("2026-11-10T07:59:59Z", "1.0.0"),        # one second before the second activation
    ("2026-11-10T08:00:00Z", "1.1.0"),
    ("2026-11-22T00:00:00Z", "1.2.0"),
    ("2026-11-30T00:00:00Z", "1.1.0"),        # after the rollback to 1.1.0
])
def test_at_scores_with_the_version_live_at_that_time(store_with_history, tmp_path, moment, version):
    store, digests, source = store_with_history
    out = tmp_path / "out.csv"
    assert _score_from_store(store, source, out, "--at", moment) == 0
    sidecar = _sidecar(out)
    assert (sidecar["version"], sidecar["digest"]) == (version, digests[version])


def test_without_version_or_time_the_active_version_scores(store_with_history, tmp_path):
    store, digests, source = store_with_history
    assert _score_from_store(store, source, tmp_path / "out.csv") == 0
    assert _sidecar(tmp_path / "out.csv")["digest"] == digests["1.1.0"]  # active after the rollback


def test_version_names_the_version_and_parquet_metadata_records_it(store_with_history, tmp_path):
    import pyarrow.parquet as pq

    store, digests, source = store_with_history
    assert _score_from_store(store, source, tmp_path / "out.parquet", "--version", "1.2.0") == 0
    metadata = pq.read_schema(tmp_path / "out.parquet" / "part-00000.parquet").metadata
    assert metadata[b"rbfgate.version"] == b"1.2.0" and metadata[b"rbfgate.digest"] == digests["1.2.0"].encode()


@pytest.mark.parametrize("arguments, message, code", [
    (["--at", "2026-10-01T00:00:00Z"], "no version of iris was live at", 2),
    (["--at", "2026-11-05"], "is not an RFC 3339 date-time with an offset", 2),
    (["--at", "yesterday"], "is not an RFC 3339 date-time with an offset", 2),
    (["--version", "9.9.9"], "9.9.9 is not in the store", 2),
])
def test_unanswerable_store_requests_are_one_line_errors(store_with_history, tmp_path, capsys, arguments, message, code):
    store, _, source = store_with_history
    assert _score_from_store(store, source, tmp_path / "out.csv", *arguments) == code
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not (tmp_path / "out.csv").exists()


def test_at_refuses_to_answer_from_an_edited_history(store_with_history, tmp_path, capsys):
    store, _, source = store_with_history
    path = store.layout.history("iris")
    lines = path.read_bytes().splitlines()
    entry = json.loads(lines[3])
    entry["version"] = "1.2.0"  # an edit that would change what was live in November
    lines[3] = json.dumps(entry, sort_keys=True).encode()
    path.write_bytes(b"".join(line + b"\n" for line in lines))
    assert _score_from_store(store, source, tmp_path / "out.csv", "--at", "2026-11-05T00:00:00Z") == 1
    assert "history of iris" in capsys.readouterr().err


def test_bundle_and_model_together_are_a_usage_error(store_with_history, tmp_path, capsys):
    store, _, source = store_with_history
    bundle_dir = store.bundle_dir("iris", "1.0.0")
    assert main(["score", "--store", str(store.root), "--model", "iris", str(bundle_dir), str(source),
                 "--out", str(tmp_path / "o.csv")]) == 2
    assert "give only INPUT" in capsys.readouterr().err
