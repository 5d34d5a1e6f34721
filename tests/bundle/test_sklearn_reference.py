"""The bundle scores exactly like scikit-learn, the reference library.

Reference: scikit-learn 1.x ``predict``, ``decision_function`` and ``predict_proba`` of
the fitted estimator. Equality means identical labels (same values, same Python type)
and |ours - reference| <= model_store.GOLDEN_TOLERANCE * max(1, |reference|) for
decisions and probabilities, on every row of the dataset, on jittered copies and on
uniform rows partly outside the training range (reference.probe_rows).

Datasets, all shipped with scikit-learn (see tests/bundle/reference.py):
- iris: R. A. Fisher, Annals of Eugenics 7(2), 1936 (UCI "Iris");
- wine: M. Forina et al., PARVUS, Genoa, 1988 (UCI "Wine");
- breast cancer: W. N. Street, W. H. Wolberg, O. L. Mangasarian, IS&T/SPIE 1993
  (UCI "Breast Cancer Wisconsin (Diagnostic)");
- digits, four classes, for the four-class one-vs-one case: E. Alpaydin, C. Kaynak,
  UCI "Optical Recognition of Handwritten Digits", 1998.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.calibration import CalibratedClassifierCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MaxAbsScaler, MinMaxScaler, RobustScaler, StandardScaler
from sklearn.svm import SVC, NuSVC
from sklearn.utils.multiclass import _ovr_decision_function

from model_store.errors import ModelFileError
from model_store.scoring import Scorer

from .reference import DATASETS, check_matches_sklearn, dataset, probe_rows

SCALERS = {
    "none": lambda: None,
    "standard": StandardScaler,
    "standard-no-mean": lambda: StandardScaler(with_mean=False),
    "standard-no-std": lambda: StandardScaler(with_std=False),
    "minmax": MinMaxScaler,
    "robust": RobustScaler,
    "maxabs": MaxAbsScaler,
}
METHODS = ("sigmoid", "isotonic", "temperature")


def _with_scaler(scaler, classifier):
    return classifier if scaler is None else make_pipeline(scaler, classifier)


@pytest.mark.parametrize("scaler", SCALERS)
@pytest.mark.parametrize("name", DATASETS)
def test_each_scaler_matches_sklearn(name, scaler, bundle_factory):
    X, y = dataset(name)
    model = _with_scaler(SCALERS[scaler](), SVC(C=2.0)).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    assert bundle.manifest.scaler.kind == scaler.split("-")[0]
    check_matches_sklearn(bundle, model, X, calibration="none")


@pytest.mark.parametrize("placement", ["outside-pipeline", "last-pipeline-step"])
@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("name", DATASETS)
def test_each_calibration_matches_sklearn(name, method, placement, bundle_factory):
    X, y = dataset(name)
    if placement == "outside-pipeline":
        model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=2.0)), method=method, ensemble=False)
    else:
        model = make_pipeline(StandardScaler(), CalibratedClassifierCV(SVC(C=2.0), method=method, ensemble=False))
    model.fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    check_matches_sklearn(bundle, model, X, calibration=method)


@pytest.mark.parametrize(("name", "method"), [("iris", "sigmoid"), ("wine", "isotonic"), ("cancer", "temperature")])
def test_prefit_model_calibrated_through_frozen_estimator_matches_sklearn(name, method, bundle_factory):
    frozen = pytest.importorskip("sklearn.frozen")
    X, y = dataset(name)
    fit_rows = np.arange(len(X)) % 2 == 0  # fit on half, calibrate on the other half
    prefit = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(X[fit_rows], y[fit_rows])
    model = CalibratedClassifierCV(frozen.FrozenEstimator(prefit), method=method).fit(X[~fit_rows], y[~fit_rows])
    assert len(model.calibrated_classifiers_) == 1  # a frozen estimator is calibrated once (ensemble="auto")
    bundle = bundle_factory(model, X, y=y)
    check_matches_sklearn(bundle, model, X, calibration=method)


@pytest.mark.parametrize("calibrated", [False, True], ids=["uncalibrated", "sigmoid"])
@pytest.mark.parametrize("name", DATASETS)
def test_nusvc_matches_sklearn(name, calibrated, bundle_factory):
    X, y = dataset(name)
    model = make_pipeline(StandardScaler(), NuSVC(nu=0.3))
    if calibrated:
        model = CalibratedClassifierCV(model, method="sigmoid", ensemble=False)
    model.fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    assert bundle.manifest.classifier.estimator == "NuSVC"
    check_matches_sklearn(bundle, model, X, calibration="sigmoid" if calibrated else "none")


LABELS = {
    # integers that are neither 0-based nor contiguous
    "int-offset": lambda y: y * 10 - 7,
    # strings whose sorted order differs from the integer order
    "str-names": lambda y: np.array(["zulu", "alpha", "mike"])[y],
    # digit strings: must stay strings, sorted as text ("10" < "9")
    "str-digits": lambda y: np.array(["9", "10", "100"])[y],
}


@pytest.mark.parametrize("labels", LABELS)
@pytest.mark.parametrize("name", DATASETS)
def test_int_and_string_labels_match_sklearn(name, labels, bundle_factory):
    X, y = dataset(name)
    target = LABELS[labels](y)
    model = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(X, target)
    bundle = bundle_factory(model, X, y=target)
    assert bundle.classes == model.classes_.tolist()  # scikit-learn's sorted classes_, same Python type
    check_matches_sklearn(bundle, model, X, calibration="none")


@pytest.mark.parametrize("name", ["iris", "wine"])
def test_break_ties_matches_sklearn(name, bundle_factory):
    X, y = dataset(name)
    model = make_pipeline(StandardScaler(), SVC(C=2.0, break_ties=True)).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    # Mixtures of the three class means land near where the pairwise votes go round in a circle.
    means = np.array([X[y == label].mean(axis=0) for label in np.unique(y)])
    mixtures = np.random.default_rng(7).dirichlet([1.0, 1.0, 1.0], size=500) @ means
    rows = check_matches_sklearn(bundle, model, X, calibration="none", extra_rows=mixtures)
    # The check only means something if the tie rule decides some rows: scikit-learn's
    # libsvm vote (break_ties=False) answers differently there.
    plain = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(X, y)
    assert np.any(plain.predict(rows) != model.predict(rows))


@pytest.mark.parametrize("calibration", ["none", *METHODS])
@pytest.mark.parametrize("name", ["iris", "wine"])
def test_ovo_decision_shape_matches_sklearn(name, calibration, bundle_factory):
    X, y = dataset(name)
    svc = SVC(C=2.0, decision_function_shape="ovo")
    if calibration == "none":
        model = make_pipeline(StandardScaler(), svc)
    else:
        model = CalibratedClassifierCV(make_pipeline(StandardScaler(), svc), method=calibration, ensemble=False)
    model.fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    assert bundle.manifest.classifier.decision_function_shape == "ovo"
    check_matches_sklearn(bundle, model, X, calibration=calibration)


@pytest.mark.parametrize("method", ["sigmoid", "isotonic"])
def test_four_class_ovo_calibration_matches_sklearn(method, bundle_factory):
    # scikit-learn fits one calibrator per class and zips them with the six one-vs-one
    # columns, so only the first four columns are used; the bundle must do the same.
    X, y = dataset("digits")
    model = CalibratedClassifierCV(SVC(decision_function_shape="ovo"), method=method, ensemble=False).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    check_matches_sklearn(bundle, model, X, calibration=method)


@pytest.mark.parametrize(
    ("name", "class_weight"),
    [("cancer", "balanced"), ("wine", {1: 1.0, 2: 3.0, 3: 0.5}), ("iris", {0: 2.0, 1: 1.0, 2: 1.0})],
)
def test_class_weight_matches_sklearn(name, class_weight, bundle_factory):
    X, y = dataset(name)
    if name == "wine":
        y = y + 1  # the dict above names classes 1, 2, 3
    model = make_pipeline(StandardScaler(), SVC(C=2.0, class_weight=class_weight)).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    check_matches_sklearn(bundle, model, X, calibration="none")


@pytest.mark.parametrize(("name", "gamma"), [("iris", "auto"), ("wine", 0.05), ("cancer", "scale")])
def test_gamma_setting_is_resolved_like_sklearn(name, gamma, bundle_factory):
    X, y = dataset(name)
    model = make_pipeline(StandardScaler(), SVC(C=2.0, gamma=gamma)).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    Z = model[0].transform(X)
    # scikit-learn SVC documentation: 'scale' is 1 / (n_features * X.var()), 'auto' is 1 / n_features.
    expected = {"auto": 1.0 / Z.shape[1], "scale": 1.0 / (Z.shape[1] * Z.var())}.get(gamma, gamma)
    assert bundle.manifest.kernel.gamma == pytest.approx(expected, rel=1e-12)
    check_matches_sklearn(bundle, model, X, calibration="none")


@pytest.mark.filterwarnings("ignore:The `probability` parameter was deprecated:FutureWarning")
def test_probability_svc_without_calibrator_keeps_libsvm_labels(bundle_factory):
    # SVC(probability=True).predict is still the libsvm vote (scikit-learn SVC docs: predict
    # may disagree with argmax of predict_proba); the bundle carries no probabilities then.
    X, y = dataset("wine")
    model = make_pipeline(StandardScaler(), SVC(C=2.0, probability=True, random_state=0)).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    assert bundle.manifest.calibration.method == "none"
    assert any("probability=True" in note for note in bundle.manifest.training["notes"])
    rows = probe_rows(X)
    scores = bundle.score(rows)
    assert scores.labels.tolist() == model.predict(rows).tolist()
    assert scores.probabilities is None


@pytest.mark.parametrize("estimator", [SVC, NuSVC])
def test_model_that_never_set_probability_gets_no_probability_note(estimator, bundle_factory):
    # scikit-learn 1.9 deprecates `probability`; its default is the string "deprecated", not True.
    X, y = dataset("iris")
    model = make_pipeline(StandardScaler(), estimator()).fit(X, y)
    assert model[-1].probability is not True
    bundle = bundle_factory(model, X, y=y)
    assert not any("probability" in note for note in bundle.manifest.training["notes"])


BINARY_LABELS = {"int": lambda y: y, "int-offset": lambda y: y * 2 + 1,
                 "str": lambda y: np.array(["benign", "malignant"])[y]}
MULTICLASS_LABELS = {"int": lambda y: y, "int-offset": lambda y: y * 10 - 7,
                     "str": lambda y: np.array(["low", "mid", "high"])[y]}
CALIBRATED_LABEL_CASES = [(method, labels) for method in METHODS for labels in ("int", "int-offset", "str")
                          if (method, labels) != ("temperature", "int-offset")]  # refused, see below


@pytest.mark.parametrize(("method", "labels"), CALIBRATED_LABEL_CASES)
@pytest.mark.parametrize("name", ["cancer", "wine"])
def test_each_calibration_with_int_and_string_labels_matches_sklearn(name, method, labels, bundle_factory):
    # scikit-learn 1.9's temperature calibrator fits its SVC on encoded string labels (classes_
    # 0, 1, 2); the bundle must still answer in the calibrator's own classes_.
    X, y = dataset(name)
    target = (BINARY_LABELS if name == "cancer" else MULTICLASS_LABELS)[labels](y)
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=2.0)), method=method, ensemble=False)
    model.fit(X, target)
    bundle = bundle_factory(model, X, y=target)
    assert bundle.classes == model.classes_.tolist()
    check_matches_sklearn(bundle, model, X, calibration=method)


@pytest.mark.parametrize("name", ["cancer", "wine"])
def test_temperature_calibration_with_integer_labels_other_than_0_to_k_is_refused(name, tmp_path):
    # scikit-learn 1.9 passes integer labels to the temperature's multinomial loss as class indices
    # (sklearn/calibration.py, _TemperatureScaling.fit): labels such as -7, 3, 13 index past the
    # logits, so the fitted temperature is not a function of the data (its fit reads undefined
    # memory). The model is built in the state such a fit leaves, from a sound fit on 0 .. k-1 with
    # the labels renamed, so the test does not depend on what that memory holds.
    X, y = dataset(name)
    target = (BINARY_LABELS if name == "cancer" else MULTICLASS_LABELS)["int-offset"](y)
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=2.0)), method="temperature", ensemble=False)
    model.fit(X, y)
    renamed = np.unique(target)
    model.classes_ = renamed
    model.calibrated_classifiers_[0].classes = renamed
    model.calibrated_classifiers_[0].estimator[-1].classes_ = renamed  # not encoded: integers are kept
    with pytest.raises(ModelFileError, match=r"refit with labels \[0, 1"):
        export_model(model, X, tmp_path / "bundle", y=target)
    assert not (tmp_path / "bundle").exists()


def test_self_test_passes_on_every_fixture_bundle(iris_raw, cancer_standard, wine_sigmoid):
    # The golden vectors were recorded from scikit-learn at export; replaying them must agree.
    # README, Concepts: 40 golden rows, 32 of them reference rows (each fixture has more than 32).
    for bundle, _, X in (iris_raw, cancer_standard, wine_sigmoid):
        bundle.self_test()
        inputs = np.asarray(bundle.manifest.golden.inputs)
        assert inputs.shape == (40, X.shape[1])
        reference_rows = {tuple(row) for row in X.tolist()}
        assert sum(tuple(row) in reference_rows for row in inputs.tolist()) == 32


# -- tie rules, on decisions that are exactly 0 ---------------------------------------------------------
# Far from every support vector the RBF kernel underflows to exactly 0 (exp(-gamma d^2) with
# gamma d^2 > 746 is below the smallest float64), so every pairwise decision equals its intercept.
# Hand-set intercepts on a fitted SVC then put a far row exactly on a tie, and scikit-learn's own
# predict (libsvm's vote) is the reference for what the bundle must answer.

FAR_ROW = np.full((1, 4), 1e6)  # iris has four features; ~1e12 squared distance from every row


def _svc_with_intercepts(y_select, intercepts):
    """An SVC fitted on iris (the classes in ``y_select``) whose intercepts are replaced."""
    X, y = dataset("iris")
    keep = np.isin(y, y_select)
    svc = SVC(C=1.0, gamma=0.5).fit(X[keep], y[keep])
    libsvm = np.asarray(intercepts, dtype=float)
    # scikit-learn keeps libsvm's intercepts in _intercept_ (what predict and decision_function
    # pass to libsvm) and exposes intercept_, negated for two classes (sklearn/svm/_base.py, fit).
    svc._intercept_ = libsvm.copy()
    svc.intercept_ = -libsvm if len(y_select) == 2 else libsvm.copy()
    return svc, X[keep], y[keep]


def test_binary_decision_exactly_zero_gives_the_label_scikit_learn_predicts(bundle_factory):
    svc, X, y = _svc_with_intercepts([0, 1], [0.0])
    assert svc.decision_function(FAR_ROW)[0] == 0.0  # the tie is real in scikit-learn
    bundle = bundle_factory(svc, X, y=y)
    scores = bundle.score(FAR_ROW)
    assert scores.decision[0] == 0.0
    assert scores.labels.tolist() == svc.predict(FAR_ROW).tolist()


@pytest.mark.parametrize(
    "intercepts",
    [[0.0, 0.0, 0.0], [1.0, -1.0, 1.0], [-1.0, 1.0, -1.0], [0.0, 1.0, 0.0], [1.0, 0.0, -1.0], [-1.0, 0.0, 0.0]],
    ids=["all-zero", "cycle", "reverse-cycle", "zero-ties", "one-zero", "two-zeros"],
)
def test_multiclass_vote_on_ties_gives_the_label_scikit_learn_predicts(intercepts, bundle_factory):
    # Equal votes (a cycle) and pairwise decisions of exactly 0 are both decided by libsvm's rules;
    # the pairs are (0, 1), (0, 2), (1, 2).
    svc, X, y = _svc_with_intercepts([0, 1, 2], intercepts)
    ovo = copy.copy(svc)
    ovo.decision_function_shape = "ovo"
    assert ovo.decision_function(FAR_ROW).tolist() == [intercepts]  # exact ties in scikit-learn itself
    bundle = bundle_factory(svc, X, y=y)
    scores = bundle.score(FAR_ROW)
    assert scores.pairwise_decision.tolist() == [intercepts]
    assert scores.labels.tolist() == svc.predict(FAR_ROW).tolist()
    assert np.array_equal(scores.decision, svc.decision_function(FAR_ROW))


def _far_scorer(intercepts):
    n_classes = {1: 2, 3: 3}[len(intercepts)]
    return Scorer(
        classes=list(range(n_classes)),
        center=np.zeros(1),
        scale=np.ones(1),
        gamma=1.0,
        support_vectors=np.zeros((n_classes, 1)),
        support_per_class=[1] * n_classes,
        dual_coef=np.ones((n_classes - 1, n_classes)),
        intercepts=np.asarray(intercepts, dtype=float),
        allowed_low=np.zeros(1),
        allowed_high=np.ones(1),
        reference_quantiles=np.linspace(0.0, 1.0, 101),
        calibrator=None,
    )


FAR = np.array([[1e6]])


def test_ovr_decision_equals_scikit_learns_transformation_on_exact_zeros():
    # Reference: sklearn.utils.multiclass._ovr_decision_function(dec < 0, -dec, n_classes),
    # which BaseSVC.decision_function applies to libsvm's one-vs-one values.
    for intercepts in ([0.0, 0.0, 0.0], [1.0, -1.0, 1.0], [0.0, 2.5, -0.75], [-3.0, 0.0, 4.0]):
        dec = np.asarray([intercepts])
        expected = _ovr_decision_function(dec < 0, -dec, 3)
        assert np.array_equal(_far_scorer(intercepts).score(FAR).decision, expected)


@pytest.mark.parametrize("n_classes", [3, 4, 10])
def test_ovr_decision_of_a_batch_is_scikit_learns_bit_for_bit(n_classes):
    # Reference: sklearn.utils.multiclass._ovr_decision_function(dec < 0, -dec, n_classes), the
    # per-pair loop BaseSVC.decision_function runs; ours accumulates each class's sum in the same
    # order without that loop, so the bits must agree (zeros, equal votes and NaN included).
    from model_store.one_vs_one import ovr_decision

    pairs = [(i, j) for i in range(n_classes) for j in range(i + 1, n_classes)]
    rng = np.random.default_rng(n_classes)
    dec = rng.normal(scale=2.0, size=(500, len(pairs)))
    dec[::5] = np.round(dec[::5])
    dec[1::5] = np.where(rng.random((100, len(pairs))) < 0.5, 1.0, -1.0)
    dec[2, 1] = np.nan
    assert np.array_equal(ovr_decision(dec, pairs, n_classes), _ovr_decision_function(dec < 0, -dec, n_classes),
                          equal_nan=True)


@pytest.mark.parametrize("n_classes", [3, 4, 10])
def test_libsvm_vote_of_a_batch_is_the_per_pair_rule(n_classes):
    # libsvm's svm_predict_values (svm.cpp): pair (i, j) votes i when its decision is > 0, else j;
    # the label is the first class with the most votes. Written here as that loop, row by row.
    from model_store.one_vs_one import libsvm_vote

    pairs = [(i, j) for i in range(n_classes) for j in range(i + 1, n_classes)]
    rng = np.random.default_rng(10 + n_classes)
    dec = np.where(rng.random((500, len(pairs))) < 0.5, 1.0, -1.0) * rng.integers(0, 2, (500, len(pairs)))
    expected = []
    for row in dec:
        votes = [0] * n_classes
        for (i, j), value in zip(pairs, row):
            votes[i if value > 0 else j] += 1
        expected.append(votes.index(max(votes)))
    assert libsvm_vote(dec, pairs, n_classes).tolist() == expected
