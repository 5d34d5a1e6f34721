"""Every supported model shape, one fixed case each, scored like scikit-learn.

The matrix: estimator (SVC, NuSVC) x scaler (none, standard, minmax, robust, maxabs) x calibration
(none, sigmoid, isotonic, temperature) x label type (int, str). Each case is fitted on iris, shipped
with scikit-learn (R. A. Fisher, "The use of multiple measurements in taxonomic problems", Annals of
Eugenics 7(2), 1936; UCI "Iris"), exported, and compared on reference.probe_rows with scikit-learn's
own predict, decision_function and predict_proba (reference.check_matches_sklearn).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MaxAbsScaler, MinMaxScaler, RobustScaler, StandardScaler
from sklearn.svm import SVC, NuSVC

from .reference import check_matches_sklearn, dataset

ESTIMATORS = {"SVC": lambda: SVC(C=2.0), "NuSVC": lambda: NuSVC(nu=0.3)}
SCALERS = {"none": None, "standard": StandardScaler, "minmax": MinMaxScaler, "robust": RobustScaler,
           "maxabs": MaxAbsScaler}
CALIBRATIONS = ("none", "sigmoid", "isotonic", "temperature")
# iris's own integer labels 0, 1, 2: scikit-learn's temperature calibration needs integers 0 .. k-1
# (other integers are refused at export, test_sklearn_reference.py; they are covered there for the others).
LABELS = {"int": lambda y: y, "str": lambda y: np.array(["setosa", "versicolor", "virginica"])[y]}


@pytest.mark.parametrize("labels", LABELS)
@pytest.mark.parametrize("calibration", CALIBRATIONS)
@pytest.mark.parametrize("scaler", SCALERS)
@pytest.mark.parametrize("estimator", ESTIMATORS)
def test_model_shape_scores_like_sklearn(estimator, scaler, calibration, labels, bundle_factory):
    X, y = dataset("iris")
    target = LABELS[labels](y)
    model = ESTIMATORS[estimator]()
    if SCALERS[scaler] is not None:
        model = make_pipeline(SCALERS[scaler](), model)
    if calibration != "none":
        model = CalibratedClassifierCV(model, method=calibration, ensemble=False)
    model.fit(X, target)
    bundle = bundle_factory(model, X, y=target)
    assert bundle.manifest.classifier.estimator == estimator
    assert bundle.manifest.scaler.kind == scaler
    assert bundle.classes == model.classes_.tolist()
    check_matches_sklearn(bundle, model, X, calibration=calibration)
