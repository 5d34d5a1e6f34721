"""Switches that cannot silently break callers: the contract comparison, and activate refusing breaking
changes unless they are accepted (then the history entry says which).

Versions of one iris model (Fisher 1936, shipped with scikit-learn), each differing in one part of
the contract: 1.0.0 calibrated (sigmoid) on four features with the default 5 % margin; 2.0.0 the
same without petal_width_cm; 3.0.0 uncalibrated; 4.0.0 the 1.0.0 model exported with no margin
(every range narrowed to the reference minimum and maximum); 5.0.0 with a 20 % margin (widened).
A version exported with another margin also has other domain thresholds: the domain model spends
what the ranges' out-of-sample refusals leave of the refusal budget (model_store.policy_fit), so
4.0.0 and 5.0.0 list a changed domain model beside their range changes.
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.errors import BreakingChangeError
from model_store.refusal import from_text
from model_store.store.contract import compare_contracts
from model_store.store.preview import preview

from store_support import FEATURES, REPO, store_with

_CLASSES = np.array(["setosa", "versicolor", "virginica"])


@pytest.fixture(scope="module")
def versions(tmp_path_factory):
    X, y = load_iris(return_X_y=True)
    labels = _CLASSES[y]
    root = tmp_path_factory.mktemp("contract")

    def calibrated(columns):
        return CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=3.0)), method="sigmoid",
                                      ensemble=False).fit(X[:, columns], labels)

    full = calibrated([0, 1, 2, 3])
    plain = make_pipeline(StandardScaler(), SVC(C=3.0)).fit(X, labels)

    def export(model, version, columns=(0, 1, 2, 3), margin=0.05):
        return export_model(model, X[:, list(columns)], root / version, y=labels, name="iris", version=version,
                            features=[FEATURES[index] for index in columns], margin=margin)

    bundles = {
        "1.0.0": export(full, "1.0.0"),
        "2.0.0": export(calibrated([0, 1, 2]), "2.0.0", columns=(0, 1, 2)),
        "3.0.0": export(plain, "3.0.0"),
        "4.0.0": export(full, "4.0.0", margin=0.0),
        "5.0.0": export(full, "5.0.0", margin=0.2),
    }
    return bundles, X


@pytest.fixture
def store(tmp_path, versions):
    bundles, _ = versions
    return store_with(tmp_path / "store", list(bundles.values()), "1.0.0")


def _refused(store, version, **kwargs) -> BreakingChangeError:
    with pytest.raises(BreakingChangeError) as caught:
        store.activate("iris", version, reason="try it", actor="alice", **kwargs)
    assert store.active("iris").version == "1.0.0"
    return caught.value


def test_dropping_a_feature_is_refused_naming_the_feature(store):
    error = _refused(store, "2.0.0")
    assert [change for change in error.changes if "petal_width_cm" in change] == [
        "feature petal_width_cm removed: records that still send it would be refused as unknown_feature"]
    last = store.history("iris")[-1]
    assert (last["action"], last["version"]) == ("refused-activate", "2.0.0")
    assert "petal_width_cm removed" in last["reason"] and "accepted_breaking" not in last


def test_dropping_calibration_is_refused(store):
    error = _refused(store, "3.0.0")
    assert [change.split(":")[0] for change in error.changes] == ["probability removed"]


def test_narrowing_to_the_active_training_range_without_recent_inputs_is_not_breaking(store, versions):
    # 4.0.0 is 1.0.0 exported without a margin: each range is exactly the training [min, max] of 1.0.0,
    # as a routine retrain narrows them. Nothing the active version was fitted on is refused.
    bundles, _ = versions
    assert [list(f.allowed) for f in bundles["4.0.0"].manifest.features] == [
        [f.training.min, f.training.max] for f in bundles["1.0.0"].manifest.features]
    entry = store.activate("iris", "4.0.0", reason="retrained, ranges tightened", actor="alice")
    assert entry["action"] == "activate" and "accepted_breaking" not in entry


def test_narrowing_past_the_active_training_range_without_recent_inputs_is_breaking_on_that_basis(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    feature = active.features[0]
    cut = _with_feature(active, allowed=(feature.training.min + 0.1, feature.allowed[1]))
    [change] = compare_contracts(active, cut).changes
    assert (change.kind, change.breaking, change.basis) == ("range_narrowed", True, "active version's training range")
    assert f"[{feature.training.min:g}, {feature.training.max:g}]" in change.detail
    assert compare_contracts(active, cut).to_dict()["range_basis"] == "active version's training range"


def test_training_values_the_active_version_already_refuses_do_not_count_against_a_narrower_range(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    training = active.features[0].training
    # The active version refuses below 5.0 (a range narrower than its training data at the bottom) ...
    strict = _with_feature(active, allowed=(5.0, active.features[0].allowed[1]))
    # ... so a candidate that also stops at the training maximum loses nothing it accepted.
    candidate = _with_feature(active, allowed=(5.0, training.max))
    [change] = compare_contracts(strict, candidate).changes
    assert (change.kind, change.breaking) == ("range_narrowed", False)


def test_the_range_basis_names_the_recent_inputs_when_there_are_some(versions):
    bundles, X = versions
    recent = [dict(zip(FEATURES, row)) for row in X[:7].tolist()]
    comparison = compare_contracts(bundles["1.0.0"].manifest, bundles["4.0.0"].manifest, recent)
    assert comparison.to_dict()["range_basis"] == "recent inputs: 7"
    assert {change.basis for change in comparison.changes if change.kind.startswith("range")} == {"recent inputs: 7"}


def test_narrowing_ranges_is_allowed_when_every_recent_input_stays_inside(store, versions):
    _, X = versions
    recent = [dict(zip(FEATURES, row)) for row in X[:50].tolist()]  # reference rows: inside a no-margin range
    entry = store.activate("iris", "4.0.0", reason="ranges tightened", actor="alice", recent=recent)
    assert entry["action"] == "activate" and "accepted_breaking" not in entry


def test_narrowing_is_breaking_when_recent_inputs_fall_outside_with_their_share(store, versions):
    _, X = versions
    high = float(X[:, 0].max()) + 0.01  # inside the 5 % margin of 1.0.0, outside 4.0.0's range
    recent = [dict(zip(FEATURES, row)) for row in X[:3].tolist()] + [dict(zip(FEATURES, X[3].tolist()), **{FEATURES[0]: high})]
    error = _refused(store, "4.0.0", recent=recent)
    [sepal] = [change for change in error.changes if change.startswith(f"feature {FEATURES[0]}")]
    assert "1 of 4 recent inputs (25.0%) would be refused" in sepal
    assert not [change for change in error.changes if change.startswith(f"feature {FEATURES[1]}")]


def test_accepted_breaking_changes_are_recorded_in_the_history_entry(store):
    refused = _refused(store, "2.0.0")
    entry = store.activate("iris", "2.0.0", reason="drop the petal width probe", actor="alice", accept_breaking=True)
    assert entry["accepted_breaking"] == list(refused.changes)
    assert store.history("iris")[-1] == entry
    assert store.verify_history("iris") == len(store.history("iris"))  # the hash chain covers the new field


def test_editing_accepted_breaking_in_the_trail_breaks_the_chain(store):
    store.activate("iris", "3.0.0", reason="uncalibrated on purpose", actor="alice", accept_breaking=True)
    trail = store.layout.history("iris")
    lines = trail.read_text().splitlines()
    entry = json.loads(lines[-1])
    entry["accepted_breaking"] = ["nothing important"]
    trail.write_text("\n".join([*lines[:-1], json.dumps(entry, sort_keys=True)]) + "\n")
    with pytest.raises(Exception, match="hash"):
        store.verify_history("iris")


def test_a_change_that_breaks_nothing_needs_no_acceptance(store):
    entry = store.activate("iris", "5.0.0", reason="wider ranges", actor="alice")
    assert "accepted_breaking" not in entry


def test_rollback_to_the_version_active_before_is_never_blocked(store):
    store.activate("iris", "2.0.0", reason="three probes", actor="alice", accept_breaking=True)
    # Going back re-adds petal_width_cm, which would count as breaking for an activation.
    entry = store.rollback("iris", reason="callers still send four readings", actor="alice")
    assert (entry["action"], entry["version"], store.active("iris").version) == ("rollback", "1.0.0", "1.0.0")


def test_the_preview_lists_the_contract_changes(store):
    contract = preview(store, "iris", "2.0.0").to_dict()["contract"]
    assert [change["kind"] for change in contract["changes"] if change["breaking"]] == ["feature_removed"]
    widened = preview(store, "iris", "5.0.0").to_dict()["contract"]
    ranges = {change["kind"] for change in widened["changes"] if change["kind"].startswith("range")}
    assert ranges == {"range_widened"} and widened["breaking"] == []


def test_class_changes_are_breaking(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    fewer = active.model_copy(update={"classifier": active.classifier.model_copy(update={"classes": ["setosa", "versicolor"]})})
    kinds = {change.kind: change.breaking for change in compare_contracts(active, fewer).changes}
    assert kinds == {"class_removed": True}
    assert {change.kind: change.breaking for change in compare_contracts(fewer, active).changes} == {"class_added": True}


def test_one_unit_changed_to_another_is_breaking(versions):
    bundles, _ = versions
    in_cm = _with_feature(bundles["1.0.0"].manifest, unit="cm")
    [change] = compare_contracts(in_cm, _with_feature(in_cm, unit="mm")).changes
    assert (change.kind, change.active, change.candidate, change.breaking) == ("unit_changed", "cm", "mm", True)


def test_a_unit_documented_or_no_longer_documented_is_listed_but_not_breaking(versions):
    bundles, _ = versions
    without = bundles["1.0.0"].manifest
    assert without.features[0].unit is None
    with_unit = _with_feature(without, unit="cm")
    assert [(c.kind, c.breaking) for c in compare_contracts(without, with_unit).changes] == [("unit_added", False)]
    assert [(c.kind, c.breaking) for c in compare_contracts(with_unit, without).changes] == [("unit_removed", False)]


def _cli(store, *args):
    return subprocess.run([sys.executable, "-m", "model_store", *args, "--store", str(store.root)],
                          capture_output=True, text=True, timeout=120, cwd=REPO)


def test_cli_activate_refuses_with_one_line_then_accepts_with_the_flag(store):
    refused = _cli(store, "activate", "iris", "3.0.0", "--reason", "try", "--actor", "alice")
    assert refused.returncode == 1
    [line] = refused.stderr.splitlines()
    assert "probability removed" in line and "--accept-breaking" in line
    accepted = _cli(store, "activate", "iris", "3.0.0", "--reason", "on purpose", "--actor", "alice", "--accept-breaking")
    assert accepted.returncode == 0, accepted.stderr
    assert "accepted breaking change: probability removed" in accepted.stdout
    assert "accepted breaking: probability removed" in _cli(store, "history", "iris").stdout


def test_cli_preview_prints_the_contract_with_the_share_of_recent_inputs(store, versions, tmp_path):
    _, X = versions
    rows = X[:9].tolist() + [[float(X[:, 0].max()) + 0.01, *X[9, 1:].tolist()]]
    inputs = tmp_path / "recent.csv"
    with open(inputs, "w", newline="") as handle:
        csv.writer(handle).writerows([["pallet_id", *FEATURES], *([f"r{i}", *row] for i, row in enumerate(rows))])
    shown = _cli(store, "preview", "iris", "4.0.0", "--inputs", str(inputs))
    assert shown.returncode == 0, shown.stderr
    # Four narrowed ranges and the domain thresholds that follow from them; only sepal length breaks.
    assert "contract: 5 change(s), 1 breaking (activating needs --accept-breaking)" in shown.stdout
    assert "1 of 10 recent inputs (10.0%) would be refused" in shown.stdout
    # The same inputs decide activation from the CLI.
    assert _cli(store, "activate", "iris", "4.0.0", "--reason", "x", "--inputs", str(inputs)).returncode == 1


def test_text_inputs_are_read_as_the_score_command_reads_them(versions):
    bundles, X = versions
    recent = [{name: str(value) for name, value in zip(FEATURES, row)} for row in X[:5].tolist()]
    comparison = compare_contracts(bundles["1.0.0"].manifest, bundles["4.0.0"].manifest, recent, from_text)
    assert comparison.recent_inputs == 5 and comparison.breaking == ()


def _with_feature(manifest, **changes):
    """``manifest`` with its first feature changed (a pydantic copy; the bundle on disk is untouched)."""
    return manifest.model_copy(update={"features": [manifest.features[0].model_copy(update=changes),
                                                    *manifest.features[1:]]})


def test_an_empty_unit_and_no_unit_are_the_same_contract(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    assert active.features[0].unit is None
    assert compare_contracts(active, _with_feature(active, unit="")).changes == ()


def test_a_range_shifted_down_is_narrowed_at_its_top_and_breaks_without_recent_inputs(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    low, high = active.features[0].allowed
    assert high - 0.5 < active.features[0].training.max  # the top cuts into the training range
    shifted = _with_feature(active, allowed=(low - 1.0, high - 0.5))  # wider below, narrower above
    [change] = compare_contracts(active, shifted).changes
    assert (change.kind, change.breaking) == ("range_narrowed", True)


def test_recent_inputs_the_active_version_already_refuses_do_not_count_against_a_narrower_range(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    low, high = active.features[0].allowed
    narrower = _with_feature(active, allowed=(low, high - 0.5))
    inside = {active.features[0].name: low}  # accepted by both
    refused_anyway = {active.features[0].name: high + 10.0}  # outside both ranges: no caller loses anything
    [change] = compare_contracts(active, narrower, [inside, refused_anyway]).changes
    assert (change.kind, change.breaking, change.recent_refused) == (
        "range_narrowed", False, {"count": 0, "of": 1, "share": 0.0})


def _csv(path, header, rows):
    with open(path, "w", newline="") as handle:
        csv.writer(handle).writerows([header, *rows])
    return str(path)


@pytest.mark.parametrize("command", [["activate", "iris", "5.0.0", "--reason", "x"], ["preview", "iris", "5.0.0"]])
def test_inputs_holding_none_of_the_feature_columns_are_refused_naming_the_expected_ones(store, tmp_path, command):
    inputs = _csv(tmp_path / "recent.csv", ["pallet_id", "weight_kg"], [["p1", "3.5"]])
    refused = _cli(store, *command, "--inputs", inputs)
    assert refused.returncode == 2
    [line] = refused.stderr.splitlines()
    assert "none of the feature columns of iris 1.0.0" in line and ", ".join(FEATURES) in line
    assert store.active("iris").version == "1.0.0"


def test_inputs_missing_some_feature_columns_are_refused_naming_the_missing_ones(store, tmp_path):
    inputs = _csv(tmp_path / "recent.csv", FEATURES[:2], [["5.1", "3.5"]])
    refused = _cli(store, "activate", "iris", "5.0.0", "--reason", "x", "--inputs", inputs)
    assert refused.returncode == 2
    [line] = refused.stderr.splitlines()
    assert f"lacks the feature column(s) {FEATURES[2]}, {FEATURES[3]} of iris 1.0.0" in line


def test_cli_activate_says_what_narrowed_ranges_were_judged_on(store):
    activated = _cli(store, "activate", "iris", "4.0.0", "--reason", "retrained", "--actor", "alice")
    assert activated.returncode == 0, activated.stderr
    assert "narrowed ranges judged on: active version's training range" in activated.stdout
