"""Reference computations for the bundle tests, taken from scikit-learn and numpy only.

Datasets (all shipped with scikit-learn, loaded offline):
- iris: R. A. Fisher, "The use of multiple measurements in taxonomic problems",
  Annals of Eugenics 7(2), 1936; UCI Machine Learning Repository "Iris".
- wine: M. Forina et al., PARVUS - An Extendible Package for Data Exploration,
  Classification and Correlation, Genoa, 1988; UCI Machine Learning Repository "Wine".
- breast cancer: W. N. Street, W. H. Wolberg, O. L. Mangasarian, "Nuclear feature
  extraction for breast tumor diagnosis", IS&T/SPIE 1993; UCI "Breast Cancer Wisconsin (Diagnostic)".
- digits (only for the four-class one-vs-one case): E. Alpaydin, C. Kaynak, "Optical
  Recognition of Handwritten Digits", UCI Machine Learning Repository, 1998.

The reference decision is computed by scikit-learn itself from the fitted objects
(the pipeline's scaler ``transform`` and the SVC's ``decision_function``), without
going through rbfgate's ``estimator_parts``.
"""

from __future__ import annotations

import copy
import functools

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.pipeline import Pipeline

from model_store import GOLDEN_TOLERANCE

__all__ = [
    "DATASETS",
    "assert_close",
    "check_matches_sklearn",
    "dataset",
    "probe_rows",
    "sklearn_decisions",
    "within_tolerance",
]

DATASETS = ("iris", "wine", "cancer")
_LOADERS = {"iris": load_iris, "wine": load_wine, "cancer": load_breast_cancer, "digits": load_digits}


@functools.cache
def _load(name: str) -> tuple[np.ndarray, np.ndarray]:
    X, y = _LOADERS[name](return_X_y=True)
    if name == "digits":  # four classes keep the one-vs-one case small: 0, 1, 2, 3
        keep = y < 4
        X, y = X[keep], y[keep]
    X.setflags(write=False)
    y.setflags(write=False)
    return X, y


def dataset(name: str) -> tuple[np.ndarray, np.ndarray]:
    """(X (n, f) float64, y (n,) int) of a scikit-learn dataset; fresh copies."""
    X, y = _load(name)
    return X.copy(), y.copy()


def probe_rows(X: np.ndarray, seed: int = 0) -> np.ndarray:
    """Rows beyond the training rows: the rows themselves, jittered copies and uniform rows
    in a box 20% wider than the data (some outside the training range)."""
    rng = np.random.default_rng(seed)
    std = X.std(axis=0)
    jittered = X + rng.normal(scale=0.3, size=X.shape) * std
    low, high = X.min(axis=0), X.max(axis=0)
    span = high - low
    uniform = rng.uniform(low - 0.2 * span, high + 0.2 * span, size=(300, X.shape[1]))
    return np.vstack([X, jittered, uniform])


def _unfreeze(model):
    return model.estimator if type(model).__name__ == "FrozenEstimator" else model


def _svc_and_transform(model):
    """The fitted SVC/NuSVC inside ``model`` and the function mapping raw rows to its input."""
    transforms = []
    while True:
        model = _unfreeze(model)
        if isinstance(model, CalibratedClassifierCV):
            model = model.calibrated_classifiers_[0].estimator
        elif isinstance(model, Pipeline):
            transforms.extend(step for _, step in model.steps[:-1] if step not in (None, "passthrough"))
            model = model.steps[-1][1]
        else:
            break

    def transform(X):
        for step in transforms:
            X = step.transform(X)
        return X

    return model, transform


def sklearn_decisions(model, X: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """scikit-learn's ovr-shaped decision_function and, with 3+ classes, its ovo decision_function."""
    svc, transform = _svc_and_transform(model)
    Z = transform(X)
    ovr, ovo = copy.copy(svc), copy.copy(svc)
    ovr.decision_function_shape, ovo.decision_function_shape = "ovr", "ovo"
    decision = ovr.decision_function(Z)
    return decision, (ovo.decision_function(Z) if len(svc.classes_) > 2 else None)


def within_tolerance(ours, reference, tolerance: float = GOLDEN_TOLERANCE) -> np.ndarray:
    """Elementwise |ours - reference| <= tolerance * max(1, |reference|) (model_store.GOLDEN_TOLERANCE)."""
    ours, reference = np.asarray(ours, dtype=np.float64), np.asarray(reference, dtype=np.float64)
    return np.abs(ours - reference) <= tolerance * np.maximum(1.0, np.abs(reference))


def assert_close(ours, reference, what: str, tolerance: float = GOLDEN_TOLERANCE) -> None:
    """Fail naming the worst element when ``within_tolerance`` does not hold everywhere."""
    ours, reference = np.asarray(ours, dtype=np.float64), np.asarray(reference, dtype=np.float64)
    assert ours.shape == reference.shape, f"{what}: shape {ours.shape}, reference {reference.shape}"
    ok = within_tolerance(ours, reference, tolerance)
    if not ok.all():
        error = np.abs(ours - reference) / np.maximum(1.0, np.abs(reference))
        worst = np.unravel_index(np.argmax(error), error.shape)
        raise AssertionError(
            f"{what}: {np.sum(~ok)} of {ok.size} values off; worst at {worst}: ours {ours[worst]!r}, "
            f"reference {reference[worst]!r}, relative error {error[worst]:.3g} > {tolerance:g}"
        )


def check_matches_sklearn(bundle, model, X, *, calibration: str, extra_rows=None) -> np.ndarray:
    """Score probe rows with the bundle and compare every output with scikit-learn; return the rows.

    ``calibration`` is the method the test fitted ("none" for an uncalibrated model): the bundle
    must say so, and a calibrated bundle's probabilities must equal scikit-learn's predict_proba.
    """
    assert bundle.manifest.calibration.method == calibration
    rows = probe_rows(X) if extra_rows is None else np.vstack([probe_rows(X), extra_rows])
    scores = bundle.score(rows)
    expected_labels = model.predict(rows).tolist()  # scikit-learn predict: the reference labels
    assert scores.labels.tolist() == expected_labels
    assert [type(label) for label in scores.labels.tolist()] == [type(label) for label in expected_labels]
    decision, pairwise = sklearn_decisions(model, rows)  # scikit-learn decision_function, ovr and ovo
    assert_close(scores.decision, decision, "decision_function")
    if pairwise is None:
        assert scores.pairwise_decision is None
    else:
        assert_close(scores.pairwise_decision, pairwise, "ovo decision_function")
    if calibration == "none":
        assert scores.probabilities is None
    else:
        assert_close(scores.probabilities, model.predict_proba(rows), "predict_proba")  # scikit-learn predict_proba
    return rows
