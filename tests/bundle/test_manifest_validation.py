"""A malformed manifest or array is refused with BundleFormatError naming the field or file.

Reference: the bundle format in README.md, "Bundle format" (a JSON manifest plus float64 .npy arrays listed
with SHA-256, dtype and shape) and RFC 8259 (JSON has no NaN or Infinity). Each test
edits one thing in a copy of a good bundle; checksums of replaced arrays are updated so
that the format check, not the integrity check, is what answers.
"""

from __future__ import annotations

import io
import json
import shutil

import numpy as np
import pytest
from sklearn.svm import SVC

from model_store import BundleFormatError, InvalidNameError, RbfgateError, load_bundle
from model_store.digest import sha256_bytes

from .reference import dataset


def _copy(bundle, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(bundle.source, copy)
    return copy


def _edit(bundle, tmp_path, edit):
    copy = _copy(bundle, tmp_path)
    path = copy / "manifest.json"
    document = json.loads(path.read_text(encoding="utf-8"))
    edit(document)
    path.write_text(json.dumps(document, indent=2), encoding="utf-8")
    return copy


def _replace_array(bundle, tmp_path, name, array, *, manifest_shape=None):
    copy = _copy(bundle, tmp_path)
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    data = buffer.getvalue()
    (copy / name).write_bytes(data)
    path = copy / "manifest.json"
    document = json.loads(path.read_text(encoding="utf-8"))
    shape = list(array.shape) if manifest_shape is None else manifest_shape
    document["files"][name].update(sha256=sha256_bytes(data), bytes=len(data), shape=shape)
    path.write_text(json.dumps(document, indent=2), encoding="utf-8")
    return copy


def _delete(*keys):
    def edit(document):
        target = document
        for key in keys[:-1]:
            target = target[key]
        del target[keys[-1]]
    return edit


def _set(value, *keys):
    def edit(document):
        target = document
        for key in keys[:-1]:
            target = target[key]
        target[keys[-1]] = value
    return edit


MANIFEST_CASES = {
    # name: (edit, text the message must contain)
    "missing-top-level-field": (_delete("kernel"), "field kernel"),
    "missing-nested-field": (_delete("classifier", "intercepts"), "field classifier.intercepts"),
    "gamma-not-a-number": (_set("wide", "kernel", "gamma"), "field kernel.gamma"),
    "gamma-negative": (_set(-0.5, "kernel", "gamma"), "field kernel.gamma"),
    "sigma-disagrees-with-gamma": (_set(3.0, "kernel", "sigma"), "does not match gamma"),
    "mixed-label-types": (_set([0, "1", 2], "classifier", "classes"), "field classifier.classes"),
    "float-labels": (_set([0.0, 1.0, 2.0], "classifier", "classes"), "field classifier.classes"),
    "repeated-class": (_set([0, 1, 1], "classifier", "classes"), "classifier.classes repeats 1"),
    "unknown-field": (_set("surprise", "comment"), "field comment"),
    "other-format": (_set("rbfgate-bundle/3", "format"), "field format"),
    "format-1-with-a-domain-model": (_set("rbfgate-bundle/1", "format"), "format rbfgate-bundle/1 has no domain model"),
    "unknown-calibration": (_set({"method": "magic"}, "calibration"), "field calibration.method"),
    "sigmoid-without-parameters": (_set({"method": "sigmoid"}, "calibration"), "sigmoid calibration needs"),
    "scaler-too-short": (lambda d: d["scaler"]["center"].pop(), "scaler has"),
    "intercepts-wrong-count": (lambda d: d["classifier"]["intercepts"].pop(), "intercepts"),
    "golden-row-too-short": (lambda d: d["golden"]["inputs"][2].pop(), "golden.inputs"),
    "golden-labels-missing-a-row": (lambda d: d["golden"]["labels"].pop(), "golden.labels"),
    "golden-label-not-a-class": (lambda d: d["golden"]["labels"].__setitem__(0, 7), "golden label 7"),
    "golden-probabilities-without-calibration": (
        lambda d: d["golden"].__setitem__("probabilities", [[1.0, 0.0, 0.0]] * len(d["golden"]["inputs"])),
        "golden.probabilities must be present exactly when",
    ),
    "file-size-not-a-number": (lambda d: d["files"]["dual_coef.npy"].__setitem__("bytes", "many"),
                                    "field files.dual_coef.npy.bytes"),
    "whitened-domain-without-whitening": (_set(None, "domain", "whitening"), "a whitened domain model needs"),
    "scaled-domain-with-whitening": (_set("scaled", "domain", "space"), "a whitened domain model needs"),
    "whitening-shrinkage-above-1": (_set(1.5, "domain", "whitening", "shrinkage"), "field domain.whitening.shrinkage"),
    "whitened-domain-without-its-array": (lambda d: d["files"].pop("domain_whitening.npy"),
                                          "field files: must list exactly the files"),
    "file-list-extra-name": (lambda d: d["files"].__setitem__("extra.npy", d["files"]["dual_coef.npy"]),
                             "field files: must list exactly the files"),
}


@pytest.mark.parametrize("case", MANIFEST_CASES)
def test_malformed_manifest_is_refused_naming_the_field(iris_raw, tmp_path, case):
    bundle, _, _ = iris_raw
    edit, expected = MANIFEST_CASES[case]
    copy = _edit(bundle, tmp_path, edit)
    with pytest.raises(BundleFormatError) as caught:
        load_bundle(copy)
    assert expected in str(caught.value)
    assert "manifest.json" in str(caught.value)


def test_allowed_range_with_low_above_high_is_refused_naming_the_feature(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, _set([5.0, 1.0], "features", 1, "allowed"))
    expected = r"field features\.1: .*feature 'x1': allowed range \[5.0, 1.0\] has low > high"
    with pytest.raises(BundleFormatError, match=expected):
        load_bundle(copy)


def test_calibration_with_the_wrong_number_of_maps_is_refused(wine_sigmoid, tmp_path):
    # scikit-learn fits one calibrator per class for three classes.
    bundle, _, _ = wine_sigmoid
    copy = _edit(bundle, tmp_path, lambda d: d["calibration"]["sigmoid"].pop())
    with pytest.raises(BundleFormatError, match="sigmoid calibration has 2 maps, expected 3"):
        load_bundle(copy)


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity", "1e999"])
def test_non_finite_number_in_the_manifest_is_refused(iris_raw, tmp_path, literal):
    # RFC 8259 has no NaN or Infinity; 1e999 overflows to infinity when parsed.
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    path = copy / "manifest.json"
    text = path.read_text(encoding="utf-8")
    gamma = json.loads(text)["kernel"]["gamma"]
    edited = text.replace(f'"gamma": {gamma!r}', f'"gamma": {literal}')
    assert edited != text
    path.write_text(edited, encoding="utf-8")
    with pytest.raises(BundleFormatError, match="manifest.json"):
        load_bundle(copy)


def test_manifest_that_is_not_json_is_refused(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    (copy / "manifest.json").write_text("{ this is not json", encoding="utf-8")
    with pytest.raises(BundleFormatError, match="manifest.json: not valid JSON"):
        load_bundle(copy)


def test_unsafe_model_name_in_the_manifest_is_refused(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, _set("../../etc", "name"))
    with pytest.raises(InvalidNameError, match="model name '../../etc'"):
        load_bundle(copy)


def test_zero_scale_is_refused(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, lambda d: d["scaler"]["scale"].__setitem__(0, 0.0))
    with pytest.raises(BundleFormatError, match="scaler.scale holds a zero"):
        load_bundle(copy)


def test_support_vectors_of_the_wrong_shape_are_refused_naming_the_file(iris_raw, tmp_path):
    bundle, model, _ = iris_raw
    narrow = np.ascontiguousarray(model.support_vectors_[:, :3])  # 3 columns for 4 features
    copy = _replace_array(bundle, tmp_path, "support_vectors.npy", narrow)
    with pytest.raises(BundleFormatError, match=r"support_vectors.npy: expected shape \(\d+, 4\)"):
        load_bundle(copy)


def test_a_whitening_of_the_wrong_shape_is_refused_naming_the_file(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _replace_array(bundle, tmp_path, "domain_whitening.npy", np.eye(3))  # 3 x 3 for 4 features
    with pytest.raises(BundleFormatError, match=r"domain_whitening.npy: expected shape \(4, 4\)"):
        load_bundle(copy)


def test_array_whose_shape_differs_from_the_manifest_is_refused_naming_the_file(iris_raw, tmp_path):
    bundle, model, _ = iris_raw
    copy = _replace_array(bundle, tmp_path, "dual_coef.npy", model.dual_coef_, manifest_shape=[1, 1])
    with pytest.raises(BundleFormatError, match=r"dual_coef.npy: expected little-endian float64 of shape \[1, 1\]"):
        load_bundle(copy)


@pytest.mark.parametrize("value", [np.nan, np.inf])
@pytest.mark.parametrize("name", ["support_vectors.npy", "dual_coef.npy", "reference_quantiles.npy"])
def test_non_finite_array_values_are_refused_naming_the_file(iris_raw, tmp_path, name, value):
    bundle, _, _ = iris_raw
    array = np.load(f"{bundle.source}/{name}", allow_pickle=False).copy()
    array.flat[-1] = value
    copy = _replace_array(bundle, tmp_path, name, array)
    with pytest.raises(BundleFormatError, match=f"{name}: holds NaN or infinite values"):
        load_bundle(copy)


def test_integer_array_is_refused_naming_the_file(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    quantiles = np.arange(101, dtype=np.int64)
    copy = _replace_array(bundle, tmp_path, "reference_quantiles.npy", quantiles)
    with pytest.raises(BundleFormatError, match="reference_quantiles.npy: expected little-endian float64"):
        load_bundle(copy)


def test_decreasing_reference_quantiles_are_refused(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _replace_array(bundle, tmp_path, "reference_quantiles.npy", np.linspace(1.0, 0.0, 101))
    with pytest.raises(BundleFormatError, match="reference_quantiles.npy: expected at least 2 non-decreasing"):
        load_bundle(copy)


def test_file_size_disagreeing_with_the_manifest_is_refused(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, lambda d: d["files"]["dual_coef.npy"].__setitem__("bytes", 12))
    with pytest.raises(BundleFormatError, match="dual_coef.npy: .* bytes, the manifest says 12"):
        load_bundle(copy)


def test_every_refusal_is_an_rbfgate_error_with_exit_code_2(iris_raw, tmp_path):
    # The CLI maps BundleFormatError to exit 2 (bad input); no malformed bundle gives a traceback.
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, _delete("golden"))
    with pytest.raises(RbfgateError) as caught:
        load_bundle(copy)
    assert isinstance(caught.value, BundleFormatError) and caught.value.exit_code == 2


# -- labels keep their type -----------------------------------------------------------------------------


def _labels_bundle(bundle_factory, labels):
    X, y = dataset("iris")
    target = np.asarray(labels, dtype=object)[y] if isinstance(labels[0], str) else np.asarray(labels)[y]
    model = SVC().fit(X, target)
    return bundle_factory(model, X, y=target), X


def test_integer_labels_stay_integers_through_export_and_load(bundle_factory):
    bundle, X = _labels_bundle(bundle_factory, [3, 10, -2])
    raw = json.loads(open(f"{bundle.source}/manifest.json", encoding="utf-8").read())
    assert raw["classifier"]["classes"] == [-2, 3, 10]  # JSON numbers, sorted like scikit-learn's classes_
    reloaded = load_bundle(bundle.source)
    assert all(type(label) is int for label in reloaded.classes)
    assert all(type(label) is int for label in reloaded.score(X).labels.tolist())
    assert all(type(label) is int for label in reloaded.manifest.golden.labels)


def test_string_labels_stay_strings_even_when_they_look_like_numbers(bundle_factory):
    bundle, X = _labels_bundle(bundle_factory, ["1", "2", "10"])
    raw = json.loads(open(f"{bundle.source}/manifest.json", encoding="utf-8").read())
    assert raw["classifier"]["classes"] == ["1", "10", "2"]  # JSON strings, text order
    reloaded = load_bundle(bundle.source)
    assert all(type(label) is str for label in reloaded.classes)
    scores = reloaded.score(X)
    assert all(type(label) is str for label in scores.labels.tolist())
    assert all(type(label) is str for label in scores.nearest_label.tolist())


@pytest.mark.parametrize("created", ["yesterday", "2026-12-01 21:40:00", "2026-12-01T21:40:00+01:00", "2026-12-01"])
def test_created_must_be_an_rfc3339_utc_time(iris_raw, tmp_path, created):
    """RFC 3339 section 5.6 date-time, written in UTC with the Z suffix as the exporter does."""
    bundle, _, _ = iris_raw
    copy = _edit(bundle, tmp_path, lambda document: document.update(created=created))
    with pytest.raises(BundleFormatError, match="created"):
        load_bundle(copy)


def test_exported_created_time_is_rfc3339_utc(iris_raw):
    from datetime import datetime, timezone

    bundle, _, _ = iris_raw
    parsed = datetime.strptime(bundle.manifest.created, "%Y-%m-%dT%H:%M:%SZ")  # RFC 3339 section 5.6
    assert parsed.replace(tzinfo=timezone.utc) <= datetime.now(timezone.utc)


def test_a_forged_npy_header_cannot_make_numpy_allocate_what_the_file_does_not_hold(iris_raw, tmp_path):
    """A 100-byte .npy whose header claims 10**8 values (800 MB) is refused before any allocation."""
    bundle, _, _ = iris_raw
    header = np.lib.format.header_data_from_array_1_0(np.zeros(1))
    header["shape"] = (10**8,)
    buffer = io.BytesIO()
    np.lib.format.write_array_header_1_0(buffer, header)
    copy = _replace_array(bundle, tmp_path, "reference_quantiles.npy", np.zeros(101))
    data = buffer.getvalue() + b"\0" * 8
    (copy / "reference_quantiles.npy").write_bytes(data)
    document = json.loads((copy / "manifest.json").read_text())
    document["files"]["reference_quantiles.npy"].update(sha256=sha256_bytes(data), bytes=len(data), shape=[10**8])
    (copy / "manifest.json").write_text(json.dumps(document))
    with pytest.raises(BundleFormatError, match="reference_quantiles.npy: holds 8 data bytes"):
        load_bundle(copy)


@pytest.mark.parametrize("text", ['"NaN"', '"1.5"', "true"])
def test_a_number_field_holding_a_string_or_boolean_is_refused(iris_raw, tmp_path, text):
    """Strict JSON types: pydantic's lax mode would turn the string "NaN" into a float NaN."""
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    path = copy / "manifest.json"
    document = json.loads(path.read_text())
    document["scaler"]["center"][0] = "PLACEHOLDER"
    path.write_text(json.dumps(document).replace('"PLACEHOLDER"', text))
    with pytest.raises(BundleFormatError, match="scaler.center.0"):
        load_bundle(copy)


def test_golden_values_that_are_nan_can_never_match(iris_raw):
    """A NaN comparison is False both ways; the golden check counts it as a mismatch."""
    from model_store import GoldenMismatchError
    from model_store.bundle import _compare

    with pytest.raises(GoldenMismatchError, match="golden vector 1"):
        _compare("bundle", "decision", np.array([1.0, np.nan]), [1.0, 2.0])
