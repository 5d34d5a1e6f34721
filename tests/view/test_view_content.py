"""What the card and the plots say, checked against scikit-learn and textbook identities (no browser)."""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.metrics.pairwise import rbf_kernel
from sklearn.model_selection import train_test_split

from model_store.errors import NotFoundError
from model_store.store import Store
from model_store.store.preview import preview
from model_store.view.assets import ASSET_DIR, asset_bytes
from model_store.view.card import bundle_card
from model_store.view.charts import change_distribution_chart, distance_histogram_chart
from model_store.view.timeline import timeline_data
from model_store.tables import read_table
from tests.view.conftest import MODEL, make_store


def test_reliability_curves_are_scikit_learns_calibration_curve_on_the_holdout_rows(demo_bundles):
    bundle = demo_bundles["1.0.0"]
    training = bundle.manifest.training
    split = training["split"]
    table = read_table(_training_csv(bundle), target="decision")
    _, X_test, _, y_test = train_test_split(table.values, np.asarray(table.target), test_size=split["test_size"],
                                            stratify=np.asarray(table.target), random_state=split["seed"])
    probabilities = bundle.score(X_test).probabilities  # equal to scikit-learn's predict_proba (tests/bundle)
    curves = training["holdout_metrics"]["reliability"]["curves"]
    assert [curve["class"] for curve in curves] == bundle.classes
    for index, curve in enumerate(curves):
        observed, predicted = calibration_curve(y_test == bundle.classes[index], probabilities[:, index], n_bins=10)
        np.testing.assert_allclose(curve["observed"], observed, rtol=1e-9)
        np.testing.assert_allclose(curve["mean_predicted"], predicted, rtol=1e-6)
        assert sum(curve["rows"]) == len(y_test)


def _training_csv(bundle) -> Path:
    return Path(bundle.source).parent / "pallet_checks.csv"  # beside the bundles (tests/view/conftest.py)


def test_kernel_width_in_raw_units_is_where_the_kernel_falls_to_exp_minus_one_half(demo_bundles):
    """exp(-gamma d^2) with d = sigma is exp(-1/2) (sigma = 1/sqrt(2 gamma)); moving one feature by
    its kernel width moves the scaled point by sigma."""
    bundle = demo_bundles["1.0.0"]
    card = bundle_card(bundle, {})
    manifest = bundle.manifest
    center, scale = np.asarray(manifest.scaler.center), np.asarray(manifest.scaler.scale)
    x = np.asarray([[feature.training.mean for feature in manifest.features]])
    for index, feature in enumerate(card["features"]):
        moved = x.copy()
        moved[0, index] += feature["kernel_width"]
        value = rbf_kernel((x - center) / scale, (moved - center) / scale, gamma=manifest.kernel.gamma)[0, 0]
        assert value == pytest.approx(np.exp(-0.5), rel=1e-12)


def test_feature_strips_show_the_reference_rows_quantiles(demo_bundles):
    bundle = demo_bundles["1.0.0"]
    table = read_table(_training_csv(bundle), target="decision")
    split = bundle.manifest.training["split"]
    X_train, *_ = train_test_split(table.values, np.asarray(table.target), test_size=split["test_size"],
                                   stratify=np.asarray(table.target), random_state=split["seed"])
    for index, feature in enumerate(bundle_card(bundle, {})["features"]):
        levels, values = feature["quantiles"]["levels"], feature["quantiles"]["values"]
        assert values[levels.index(0.5)] == pytest.approx(np.median(X_train[:, index]))
        assert (values[0], values[-1]) == (X_train[:, index].min(), X_train[:, index].max())


def test_distance_histogram_shares_rise_from_zero_to_one_across_the_reference_quantiles():
    quantiles = np.linspace(0.0, 3.0, 101) ** 2  # any non-decreasing quantiles
    bars = distance_histogram_chart(quantiles)["layer"][0]["data"]["values"]
    assert sum(bar["share"] for bar in bars) == pytest.approx(1.0)
    # Uniform on [0, 1] has quantile q at q: every equal-width bin holds the same share.
    flat = distance_histogram_chart(np.linspace(0.0, 1.0, 101))["layer"][0]["data"]["values"]
    assert [bar["share"] for bar in flat] == pytest.approx([1 / len(flat)] * len(flat))


def test_change_distribution_counts_every_row_scored_by_both_once(demo_bundles, tmp_path):
    store = Store(make_store(tmp_path / "store", demo_bundles))
    report = preview(store, MODEL, "2.0.0").to_dict()
    distribution = report["change_distribution"]
    assert distribution["measure"] == "probability" and len(distribution["edges"]) == 21
    assert sum(map(sum, distribution["counts"].values())) == report["rows"]["scored_by_both"]
    # The largest change lands in the last non-empty bin.
    largest = report["largest_probability_change"]["change"]
    last = max(index for counts in distribution["counts"].values() for index, count in enumerate(counts) if count)
    assert distribution["edges"][last] <= largest <= distribution["edges"][last + 1]
    bars = change_distribution_chart(distribution)["data"]["values"]
    assert sum(bar["rows"] for bar in bars) == report["rows"]["scored_by_both"]


ENTRIES = [
    {"seq": 1, "time": "2026-01-01T00:00:00Z", "action": "publish", "version": "1", "actor": "a", "reason": None, "digest": "d1"},
    {"seq": 2, "time": "2026-01-02T00:00:00Z", "action": "activate", "version": "1", "actor": "a", "reason": "r1", "digest": "d1"},
    {"seq": 3, "time": "2026-01-03T00:00:00Z", "action": "activate", "version": "2", "actor": "b", "reason": "r2", "digest": "d2"},
    {"seq": 4, "time": "2026-01-04T00:00:00Z", "action": "rollback", "version": "1", "actor": "c", "reason": "r3", "digest": "d1"},
]


def test_timeline_has_one_stretch_per_live_version_and_knows_the_rollback_target():
    timeline = timeline_data(ENTRIES, now="2026-02-01T00:00:00Z")
    assert [(item["version"], item["start"], item["end"]) for item in timeline["intervals"]] == [
        ("1", "2026-01-02T00:00:00Z", "2026-01-03T00:00:00Z"),
        ("2", "2026-01-03T00:00:00Z", "2026-01-04T00:00:00Z"),
        ("1", "2026-01-04T00:00:00Z", "2026-02-01T00:00:00Z"),
    ]
    assert timeline["rollback_to"] is None  # the rollback emptied the undo stack back to its first activation
    timeline = timeline_data(ENTRIES[:3], now="2026-02-01T00:00:00Z")
    assert timeline["rollback_to"] == "1"


@pytest.mark.parametrize("name", ["../assets.py", "vendor/../../card.py", "vendor/README.md", "missing.js", ""])
def test_only_listed_assets_are_served(name):
    with pytest.raises(NotFoundError):
        asset_bytes(name)


def test_vendored_files_are_the_ones_their_readme_lists():
    readme = (ASSET_DIR / "vendor" / "README.md").read_text()
    listed = dict((name, digest) for digest, name in re.findall(r"^\s+([0-9a-f]{64})  (\S+\.js)$", readme, re.M))
    assert sorted(listed) == ["vega-interpreter.js", "vega-lite.min.js", "vega.min.js"]
    for name, digest in listed.items():
        assert hashlib.sha256((ASSET_DIR / "vendor" / name).read_bytes()).hexdigest() == digest, name
