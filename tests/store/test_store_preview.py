"""Swap preview, checked against scikit-learn's own predictions and decision values for both models.

The active model is an RBF SVC with C=1 exported with a 20 % range margin; the candidate an RBF SVC with
C=0.05 exported with no margin, both fitted on iris (Fisher 1936, shipped with scikit-learn). The
reference answers come from the fitted scikit-learn pipelines (predict, decision_function) and
sklearn.metrics.confusion_matrix, never from the bundles.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix
from store_support import FEATURES, decision_rows, iris_bundle, iris_model, tree_snapshot

from model_store.errors import NotFoundError
from model_store.store import Store
from model_store.store.preview import preview


@pytest.fixture
def setup(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    active_dir = iris_bundle(bundle_factory, "1.0.0", C=1.0, margin=0.2)
    candidate_dir = iris_bundle(bundle_factory, "2.0.0", C=0.05, margin=0.0)
    store.publish(active_dir, actor="alice")
    store.publish(candidate_dir, actor="alice")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    return store, active_dir, candidate_dir


def _allowed(bundle_dir) -> np.ndarray:
    manifest = json.loads((bundle_dir / "manifest.json").read_text())
    return np.array([feature["allowed"] for feature in manifest["features"]])


def _inside(rows: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    return np.all((rows >= allowed[:, 0]) & (rows <= allowed[:, 1]), axis=1)


def test_label_flips_and_class_table_match_scikit_learn(setup):
    store, active_dir, candidate_dir = setup
    rows = decision_rows([active_dir, candidate_dir])  # both versions' golden vectors, in report order
    accepted = _inside(rows, _allowed(active_dir)) & _inside(rows, _allowed(candidate_dir))
    active_labels = iris_model(1.0)[0].predict(rows[accepted])
    candidate_labels = iris_model(0.05)[0].predict(rows[accepted])
    assert (active_labels != candidate_labels).sum() > 0  # the fixture really differs

    report = preview(store, "iris", "2.0.0")
    assert report.scored_by_both == accepted.sum()
    assert report.flips == (active_labels != candidate_labels).sum()
    assert report.flip_table["counts"] == confusion_matrix(active_labels, candidate_labels, labels=[0, 1, 2]).tolist()


def test_largest_decision_change_matches_scikit_learn(setup):
    store, active_dir, candidate_dir = setup
    rows = decision_rows([active_dir, candidate_dir])
    rows = rows[_inside(rows, _allowed(active_dir)) & _inside(rows, _allowed(candidate_dir))]
    before = iris_model(1.0)[0].decision_function(rows)  # (n, 3), scikit-learn's ovr shape
    after = iris_model(0.05)[0].decision_function(rows)
    largest = np.unravel_index(np.argmax(np.abs(after - before)), before.shape)

    change = preview(store, "iris", "2.0.0").largest_decision_change
    assert change["change"] == pytest.approx(abs(after[largest] - before[largest]), rel=1e-8)
    assert (change["active"], change["candidate"]) == (
        pytest.approx(before[largest], rel=1e-8, abs=1e-9),
        pytest.approx(after[largest], rel=1e-8, abs=1e-9),
    )
    assert change["class"] == largest[1]  # iris classes are 0, 1, 2: the column is the class


def test_rows_only_one_version_refuses_are_reported_with_their_problem(setup):
    store, active_dir, candidate_dir = setup
    _, X, _ = iris_model(1.0)
    high = X[:, 0].max() + 0.1 * np.ptp(X[:, 0])  # inside a 20 % margin, outside no margin
    records = [
        dict(zip(FEATURES, X[0].tolist())),
        {**dict(zip(FEATURES, X[0].tolist())), FEATURES[0]: high},
        {**dict(zip(FEATURES, X[0].tolist())), FEATURES[1]: "abc"},
    ]
    report = preview(store, "iris", "2.0.0", records)
    [example] = [item for item in report.examples["candidate_only"] if item["source"] == "inputs"]
    assert example["row"] == 2
    assert example["problems"][0]["feature"] == FEATURES[0]
    assert example["problems"][0]["reason"] == "out_of_range"
    assert report.refused_by_both == 1
    assert not [item for item in report.examples["active_only"] if item["source"] == "inputs"]

    store.activate("iris", "2.0.0", reason="the other way round", actor="alice", accept_breaking=True)
    reverse = preview(store, "iris", "1.0.0", records)
    assert [item["row"] for item in reverse.examples["active_only"] if item["source"] == "inputs"] == [2]


def test_changed_allowed_ranges_are_listed(setup):
    store, active_dir, candidate_dir = setup
    before, after = _allowed(active_dir), _allowed(candidate_dir)
    changes = preview(store, "iris", "2.0.0").range_changes
    assert [change["feature"] for change in changes] == FEATURES
    assert [change["active"] for change in changes] == before.tolist()
    assert [change["candidate"] for change in changes] == after.tolist()


def test_previewing_the_active_version_shows_no_change(setup):
    store, _, _ = setup
    report = preview(store, "iris", "1.0.0")
    assert (report.flips, report.largest_decision_change["change"], report.range_changes) == (0, 0.0, [])


def test_preview_changes_nothing_in_the_store(setup):
    store, _, _ = setup
    before = tree_snapshot(store.root)
    preview(store, "iris", "2.0.0", [{"sepal_length_cm": 5.0}])
    assert tree_snapshot(store.root) == before


def test_preview_needs_an_active_version(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    with pytest.raises(NotFoundError, match="no active version"):
        preview(store, "iris", "1.0.0")


def test_the_report_is_json_safe_and_its_text_names_the_flip_count(setup):
    store, _, _ = setup
    report = preview(store, "iris", "2.0.0")
    document = json.loads(json.dumps(report.to_dict()))
    assert document["label_flips"]["count"] == report.flips
    assert f"labels that would flip: {report.flips} of {report.scored_by_both}" in report.render_text()


def test_preview_inputs_are_matched_by_column_name(setup, tmp_path):
    # CSV inputs with the columns reversed and an id column: read by header name, as 'rbfgate score' does.
    from model_store.cli.store_commands import read_preview_inputs
    from model_store.refusal import from_text

    store, _, _ = setup
    _, X, _ = iris_model(1.0)
    rows = X[::5]  # every class
    source = tmp_path / "inputs.csv"
    lines = [",".join(["id", *reversed(FEATURES)])]
    lines += [",".join([f"r{i}", *map(repr, reversed(row.tolist()))]) for i, row in enumerate(rows)]
    source.write_text("\n".join(lines) + "\n")
    records, numbers = read_preview_inputs(source)
    report = preview(store, "iris", "2.0.0", records, record_rows=numbers, convert=from_text, allow_extra=True)
    assert report.sources["inputs"] == len(rows)
    active_labels, candidate_labels = iris_model(1.0)[0].predict(rows), iris_model(0.05)[0].predict(rows)
    assert report.flips_by_source["inputs"] == int((active_labels != candidate_labels).sum())
    assert (report.refused_by_both, report.refused_by_active_only, report.refused_by_candidate_only) == (0, 0, 0)


def test_domain_verdict_changes_are_counted_from_both_versions_scores(setup):
    # The reference: each stored bundle's own verdicts (its one-class decision is checked against
    # scikit-learn in tests/bundle/test_domain_model.py) on the rows both versions accept.
    store, active_dir, candidate_dir = setup
    rows = decision_rows([active_dir, candidate_dir])
    rows = rows[_inside(rows, _allowed(active_dir)) & _inside(rows, _allowed(candidate_dir))]
    odd = np.array([[4.4, 4.3, 6.8, 0.2]])  # in range for both, unlike any iris flower
    records = [dict(zip(FEATURES, odd[0].tolist()))]
    before = store.load_verified("iris", "1.0.0").score(np.vstack([rows, odd])).domain_verdict.tolist()
    after = store.load_verified("iris", "2.0.0").score(np.vstack([rows, odd])).domain_verdict.tolist()
    changes = preview(store, "iris", "2.0.0", records).domain_changes
    assert changes["changed"] == sum(a != c for a, c in zip(before, after))
    verdicts = changes["verdicts"]
    for a in set(before):
        for c in set(after):
            expected = sum(x == a and y == c for x, y in zip(before, after))
            assert changes["counts"][verdicts.index(a)][verdicts.index(c)] == expected, (a, c)
    assert "domain verdicts that would change" in preview(store, "iris", "2.0.0", records).render_text()
