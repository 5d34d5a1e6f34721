"""Take a fitted scikit-learn estimator apart into the plain data a bundle holds.

Accepted shapes (anything else raises ``ModelFileError``, which the CLI maps to exit 2):

    SVC | NuSVC                                   kernel='rbf', fitted, dense
    Pipeline([scaler, SVC | NuSVC])               scaler: Standard, MinMax, Robust or MaxAbs
    CalibratedClassifierCV(one of the above)      exactly one calibrated classifier
    Pipeline([scaler, CalibratedClassifierCV(SVC | NuSVC)])

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

import copy
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.exceptions import NotFittedError
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import MaxAbsScaler, MinMaxScaler, RobustScaler, StandardScaler
from sklearn.svm import SVC, NuSVC
from sklearn.utils.validation import check_is_fitted

from model_store.errors import ModelFileError

__all__ = ["ModelParts", "plain_arrays_accepted", "take_apart"]


@contextmanager
def plain_arrays_accepted() -> Iterator[None]:
    """Silence scikit-learn's warning when a model fitted on named columns gets a plain array.

    The exporter always passes columns in the model's own feature order, so the
    warning would only be noise.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="X does not have valid feature names")
        yield


@dataclass
class ModelParts:
    """The pieces of a fitted model; arrays are float64, scaled space unless noted."""

    estimator: object  # outermost fitted object: its predict / predict_proba are the reference
    svc: SVC | NuSVC
    scaler: object | None  # the fitted scikit-learn scaler, None when there is none
    scaler_kind: str
    center: np.ndarray  # (f,) raw units
    scale: np.ndarray  # (f,) raw units per scaled unit
    calibration: dict
    feature_names: list[str] | None
    classes: list
    notes: list[str] = field(default_factory=list)

    @property
    def n_features(self) -> int:
        return len(self.center)

    def decisions(self, raw: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """scikit-learn's ovr-shaped decision and (multiclass) one-vs-one decision for raw rows."""
        scaled = raw if self.scaler is None else self.scaler.transform(raw)
        ovr = copy.copy(self.svc)
        ovr.decision_function_shape = "ovr"
        decision = ovr.decision_function(scaled)
        if len(self.classes) == 2:
            return decision, None
        ovo = copy.copy(self.svc)
        ovo.decision_function_shape = "ovo"
        return decision, ovo.decision_function(scaled)


def take_apart(model: object) -> ModelParts:
    """Split a fitted estimator into scaler, SVC and calibration; refuse anything else."""
    estimator = model
    calibration = {"method": "none"}
    scaler = None
    notes: list[str] = []
    calibrator = None  # the CalibratedClassifierCV, whose classes_ are the model's labels
    feature_names = _feature_names(model)
    if isinstance(model, CalibratedClassifierCV):
        calibrator = model
        inner, calibration = _calibrated(model)
        model = _unfreeze(inner)
    if isinstance(model, Pipeline):
        scaler, model = _pipeline(model)
        if isinstance(model, CalibratedClassifierCV):
            if calibration["method"] != "none":
                raise ModelFileError("the model is calibrated twice (a calibrator inside a calibrator); keep one")
            calibrator = model
            model, calibration = _calibrated(model)
            model = _unfreeze(model)
            if isinstance(model, Pipeline):
                raise ModelFileError("a Pipeline inside a calibrator inside a Pipeline is not supported; flatten it")
    model = _unfreeze(model)
    if not isinstance(model, (SVC, NuSVC)):
        raise ModelFileError(
            f"expected an SVC or NuSVC (bare, in a Pipeline with one scaler, or calibrated); got {type(model).__name__}"
        )
    svc = model
    _check_svc(svc)
    if svc.break_ties and svc.decision_function_shape == "ovo" and calibration["method"] == "none":
        # scikit-learn's own predict raises here, so there is no reference to reproduce.
        raise ModelFileError(
            "break_ties=True with decision_function_shape='ovo' cannot predict in scikit-learn; "
            "refit with break_ties=False or decision_function_shape='ovr'"
        )
    # scikit-learn 1.9 deprecates the parameter and its default is the truthy string "deprecated":
    # only an explicit probability=True asks libsvm for its internal Platt probabilities.
    if getattr(svc, "probability", False) is True and calibration["method"] == "none":
        notes.append(
            "probability=True: libsvm's internal Platt probabilities are not carried into the bundle; "
            "wrap the model in CalibratedClassifierCV(ensemble=False) to export probabilities"
        )
    classes = _labels(_outer_classes(svc, calibrator))
    _check_temperature_labels(calibration["method"], svc, classes)
    kind, center, scale = _scaler_parts(scaler, svc.n_features_in_)
    return ModelParts(estimator, svc, scaler, kind, center, scale, calibration, feature_names, classes, notes)


def _feature_names(model) -> list[str] | None:
    names = getattr(model, "feature_names_in_", None)
    return [str(name) for name in names] if names is not None else None


def _outer_classes(svc, calibrator) -> np.ndarray:
    """The labels the model predicts, in the order of the SVC's classes (its vote and dual_coef_ order).

    scikit-learn 1.9's CalibratedClassifierCV(method="temperature") encodes string labels before
    fitting its inner estimator (sklearn/calibration.py, ``CalibratedClassifierCV.fit``), so that
    SVC's ``classes_`` are the codes 0 .. k-1, which index the calibrator's own ``classes_``.
    """
    inner = np.asarray(svc.classes_)
    if calibrator is None:
        return inner
    outer = np.asarray(calibrator.classes_)
    if len(inner) == len(outer) and inner.tolist() == outer.tolist():
        return inner
    if len(inner) == len(outer) and inner.dtype.kind in "iu" and inner.tolist() == list(range(len(outer))):
        return outer[inner]
    raise ModelFileError(
        f"the calibrator's classes {outer.tolist()} do not match its SVC's classes {inner.tolist()}; "
        "fit the calibrator and the SVC on the same labels"
    )


def _check_temperature_labels(method: str, svc, classes: list) -> None:
    """Refuse a temperature calibrator whose integer labels are not 0 .. k-1.

    scikit-learn 1.9 encodes only string labels before fitting its temperature calibrator; integer
    labels go to the multinomial loss as class indices (sklearn/calibration.py,
    ``_TemperatureScaling.fit``), so labels such as 1, 2, 3 index past the logits and the fitted
    temperature comes from undefined values (it changed from run to run here). There is no sound
    model to reproduce.
    """
    encoded = list(range(len(classes)))
    if method == "temperature" and isinstance(classes[0], int) and classes != encoded and \
            np.asarray(svc.classes_).tolist() == classes:
        raise ModelFileError(
            f"temperature calibration with the integer labels {classes}: scikit-learn fits its temperature "
            f"using the labels as class indices, which only works for {encoded}; refit with labels "
            f"{encoded} or with string labels"
        )


def _pipeline(pipeline: Pipeline):
    steps = [step for _, step in pipeline.steps if step not in (None, "passthrough")]
    if len(steps) == 1:
        return None, steps[0]
    if len(steps) == 2 and isinstance(steps[0], (StandardScaler, MinMaxScaler, RobustScaler, MaxAbsScaler)):
        return steps[0], steps[1]
    names = [type(step).__name__ for step in steps]
    raise ModelFileError(
        f"pipeline steps {names} are not supported; expected at most one per-feature scaler "
        "(StandardScaler, MinMaxScaler, RobustScaler, MaxAbsScaler) followed by an SVC or NuSVC"
    )


def _calibrated(model: CalibratedClassifierCV):
    try:
        check_is_fitted(model, "calibrated_classifiers_")
    except NotFittedError as exc:
        raise ModelFileError("the CalibratedClassifierCV is not fitted; fit it before exporting") from exc
    calibrated = model.calibrated_classifiers_
    if len(calibrated) != 1:
        raise ModelFileError(
            f"the calibrator averages {len(calibrated)} models (ensemble=True); refit it with ensemble=False "
            "so that one SVC and one calibration describe the model"
        )
    single = calibrated[0]
    method = single.method
    if method == "sigmoid":
        spec = {"method": "sigmoid", "sigmoid": [{"a": float(c.a_), "b": float(c.b_)} for c in single.calibrators]}
    elif method == "isotonic":
        spec = {
            "method": "isotonic",
            "isotonic": [
                {"x_thresholds": c.X_thresholds_.astype(float).tolist(), "y_thresholds": c.y_thresholds_.astype(float).tolist()}
                for c in single.calibrators
            ],
        }
    elif method == "temperature":
        spec = {"method": "temperature", "beta": float(single.calibrators[0].beta_)}
    else:
        raise ModelFileError(f"calibration method {method!r} is not supported; use sigmoid, isotonic or temperature")
    return single.estimator, spec


def _unfreeze(model):
    # FrozenEstimator (a prefit model handed to a calibrator) keeps the real one in .estimator.
    if type(model).__name__ == "FrozenEstimator":
        return model.estimator
    return model


def _check_svc(svc) -> None:
    try:
        check_is_fitted(svc, "support_vectors_")
    except NotFittedError as exc:
        raise ModelFileError(f"the {type(svc).__name__} is not fitted; fit it before exporting") from exc
    if svc.kernel != "rbf":
        raise ModelFileError(f"kernel is {svc.kernel!r}; rbfgate exports RBF-kernel models only (kernel='rbf')")
    if getattr(svc, "_sparse", False):
        raise ModelFileError("the model was fitted on sparse data; refit it on a dense array to export")
    if len(svc.classes_) < 2:
        raise ModelFileError("the model has fewer than two classes")


def _labels(classes: np.ndarray) -> list:
    if classes.dtype.kind in "iu":
        return [int(label) for label in classes]
    if classes.dtype.kind in "UO" and all(isinstance(label, str) for label in classes):
        return [str(label) for label in classes]
    raise ModelFileError(
        f"class labels of type {classes.dtype} are not supported; use integer or string labels "
        "so that they keep their type through JSON"
    )


def _scaler_parts(scaler, n_features: int) -> tuple[str, np.ndarray, np.ndarray]:
    ones, zeros = np.ones(n_features), np.zeros(n_features)
    if scaler is None:
        return "none", zeros, ones
    try:
        check_is_fitted(scaler)
    except NotFittedError as exc:
        raise ModelFileError(
            f"the pipeline's {type(scaler).__name__} is not fitted; fit the pipeline before exporting"
        ) from exc
    if isinstance(scaler, StandardScaler):
        center = scaler.mean_ if scaler.with_mean else zeros
        scale = scaler.scale_ if scaler.with_std else ones
        return "standard", np.asarray(center, float), np.asarray(scale, float)
    if isinstance(scaler, MinMaxScaler):
        if scaler.clip:
            raise ModelFileError("MinMaxScaler(clip=True) is not an affine map; refit with clip=False")
        # sklearn computes raw * scale_ + min_, i.e. (raw - (-min_ / scale_)) / (1 / scale_).
        return "minmax", -scaler.min_ / scaler.scale_, 1.0 / scaler.scale_
    if isinstance(scaler, RobustScaler):
        center = scaler.center_ if scaler.with_centering else zeros
        scale = scaler.scale_ if scaler.with_scaling else ones
        return "robust", np.asarray(center, float), np.asarray(scale, float)
    return "maxabs", zeros, np.asarray(scaler.scale_, float)
