"""The domain model in the contract comparison: a candidate that would refuse, as outside_domain,
records the active version scores is breaking; with recent inputs they are counted, without them
the refuse rates each version was exported with decide.

Versions of one calibrated iris model (Fisher 1936, shipped with scikit-learn), all with the same
allowed ranges (given in the feature info, so only the domain model differs): 1.0.0 exported with
the default refuse rate (1 %), 1.1.0 with 20 % (thresholds higher, more rows outside), 1.2.0 with
1 % but its domain model fitted on every other reference row (another model, the same rate).
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.errors import BreakingChangeError
from model_store.refusal import check_records
from model_store.store.contract import compare_contracts
from model_store.store.preview import preview

from store_support import FEATURES, store_with

_CLASSES = np.array(["setosa", "versicolor", "virginica"])


@pytest.fixture(scope="module")
def versions(tmp_path_factory):
    X, y = load_iris(return_X_y=True)
    labels = _CLASSES[y]
    root = tmp_path_factory.mktemp("contract-domain")
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=3.0)), method="sigmoid",
                                   ensemble=False).fit(X, labels)
    allowed = {name: {"allowed": [float(X[:, i].min()) - 1.0, float(X[:, i].max()) + 1.0]}
               for i, name in enumerate(FEATURES)}

    def export(version, rows, refuse_rate):
        return export_model(model, X[rows], root / version, y=labels[rows], name="iris", version=version,
                            features=FEATURES, feature_info=allowed, refuse_rate=refuse_rate)

    everything = np.arange(len(X))
    bundles = {
        "1.0.0": export("1.0.0", everything, 0.01),
        "1.1.0": export("1.1.0", everything, 0.20),
        "1.2.0": export("1.2.0", everything[::2], 0.01),
    }
    return bundles, X


@pytest.fixture
def store(tmp_path, versions):
    bundles, _ = versions
    return store_with(tmp_path / "store", list(bundles.values()), "1.0.0")


def _records(rows) -> list[dict[str, float]]:
    return [dict(zip(FEATURES, map(float, row))) for row in rows]


def _newly_outside(active, candidate, records) -> tuple[int, int]:
    """Counted with the bundles' own scorer (whose one-class decision the bundle tests check against
    scikit-learn's OneClassSVM.decision_function): records active scores, and of those, candidate refuses."""
    def verdicts(bundle):
        checked = check_records(bundle.manifest.features, records)
        assert len(checked.accepted) == len(records)  # the ranges accept every row here
        return bundle.score(checked.values).domain_verdict

    before, after = verdicts(active), verdicts(candidate)
    scored = before != "outside"
    return int(np.sum(scored & (after == "outside"))), int(np.sum(scored))


def test_the_domain_changes_are_listed_with_thresholds_and_refuse_rates(versions):
    bundles, _ = versions
    active, candidate = bundles["1.0.0"].manifest, bundles["1.1.0"].manifest
    [change] = compare_contracts(active, candidate).changes
    assert change.kind == "domain_changed"
    assert change.active == {"outside_below": active.domain.thresholds.outside_below,
                             "unusual_below": active.domain.thresholds.unusual_below, "refuse_rate": 0.01}
    assert change.candidate["refuse_rate"] == 0.2


def test_a_higher_refuse_rate_is_breaking_without_recent_inputs(versions):
    bundles, _ = versions
    [change] = compare_contracts(bundles["1.0.0"].manifest, bundles["1.1.0"].manifest).changes
    assert (change.breaking, change.basis, change.recent_refused) == (True, "refuse rates", None)


def test_another_domain_model_with_the_same_refuse_rate_is_not_breaking_without_recent_inputs(versions):
    bundles, _ = versions
    [change] = compare_contracts(bundles["1.0.0"].manifest, bundles["1.2.0"].manifest).changes
    assert (change.kind, change.breaking, change.basis) == ("domain_changed", False, "refuse rates")


def test_recent_inputs_the_candidate_would_newly_refuse_as_outside_domain_are_counted(versions):
    bundles, X = versions
    active, candidate = bundles["1.0.0"], bundles["1.1.0"]
    recent = _records(X)
    count, of = _newly_outside(active, candidate, recent)
    assert count > 0  # a 20 % refuse rate puts more of iris outside than a 1 % one
    [change] = compare_contracts(active.manifest, candidate.manifest, recent, bundles=(active, candidate)).changes
    assert change.recent_refused == {"count": count, "of": of, "share": count / of}
    assert (change.breaking, change.basis) == (True, f"recent inputs: {len(X)}")


def test_recent_inputs_both_domain_models_accept_make_a_changed_domain_safe(versions):
    bundles, X = versions
    active, candidate = bundles["1.0.0"], bundles["1.1.0"]
    typical = [record for record in _records(X) if _newly_outside(active, candidate, [record]) == (0, 1)]
    [change] = compare_contracts(active.manifest, candidate.manifest, typical, bundles=(active, candidate)).changes
    assert change.recent_refused["count"] == 0 and not change.breaking


def test_a_domain_model_removed_is_breaking_because_domain_turns_null(versions):
    bundles, _ = versions
    active = bundles["1.0.0"].manifest
    [change] = compare_contracts(active, active.model_copy(update={"domain": None})).changes
    assert (change.kind, change.breaking) == ("domain_removed", True)


def test_a_domain_model_added_is_breaking_without_recent_inputs(versions):
    bundles, _ = versions
    candidate = bundles["1.0.0"].manifest
    [change] = compare_contracts(candidate.model_copy(update={"domain": None}), candidate).changes
    assert (change.kind, change.breaking) == ("domain_added", True)


def test_activate_refuses_a_candidate_that_would_refuse_recent_inputs_as_outside_domain(store, versions):
    _, X = versions
    with pytest.raises(BreakingChangeError) as caught:
        store.activate("iris", "1.1.0", reason="retrained", actor="alice", recent=_records(X))
    [line] = caught.value.changes
    assert line.startswith("domain model changed") and "would be refused as outside_domain" in line
    assert store.active("iris").version == "1.0.0"


def test_a_model_that_only_flags_outside_records_breaks_nobody_with_a_stricter_domain(store, versions):
    _, X = versions
    store.set_outside_action("iris", "flag", reason="answer them flagged", actor="alice")
    entry = store.activate("iris", "1.1.0", reason="retrained", actor="alice", recent=_records(X))
    assert "accepted_breaking" not in entry


def test_the_preview_counts_the_recent_inputs_newly_outside_the_domain(store, versions):
    bundles, X = versions
    recent = _records(X)
    count, of = _newly_outside(bundles["1.0.0"], bundles["1.1.0"], recent)
    contract = preview(store, "iris", "1.1.0", recent).to_dict()["contract"]
    [change] = [change for change in contract["changes"] if change["kind"] == "domain_changed"]
    assert change["recent_refused"] == {"count": count, "of": of, "share": count / of} and change["breaking"]
