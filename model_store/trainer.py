"""Train an RBF SVC on a CSV file and export it as a bundle.

Steps: stratified train/holdout split; StandardScaler + SVC(kernel='rbf');
unless both the kernel width and C are given, a log-spaced grid search with
stratified k-fold cross-validation on the training split; optional
calibration (CalibratedClassifierCV, ensemble=False); export with the training
split as the reference rows and the holdout split as the holdout (its metrics,
the domain thresholds and the refusal report come from it).

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.model_selection import StratifiedKFold, cross_val_score, train_test_split
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC
from tqdm import tqdm

from model_store.bundle import Bundle
from model_store.digest import sha256_file
from model_store.errors import CsvError, InputError
from model_store.estimator_parts import take_apart
from model_store.exporter import DEFAULT_MARGIN, DEFAULT_REFUSE_RATE, ExportRequest, check_feature_names, export_bundle
from model_store.naming import check_name
from model_store.tables import Table, read_table

__all__ = ["CALIBRATIONS", "MIN_ROWS_PER_CLASS", "TrainRequest", "train_bundle"]

CALIBRATIONS = ("sigmoid", "isotonic", "temperature", "none")
MIN_ROWS_PER_CLASS = 6
_C_GRID = np.logspace(-1, 3, 5)  # 0.1 ... 1000
_GAMMA_FACTORS = np.logspace(-2, 1, 4)  # times 1 / n_features, the width of gamma='scale' on standardised data
_MAX_FOLDS = 5


@dataclass
class TrainRequest:
    data: Path
    target: str
    name: str
    version: str
    out: Path
    sigma: float | None = None
    gamma: float | None = None
    C: float | None = None
    calibration: str = "sigmoid"
    test_size: float = 0.25
    seed: int = 0
    margin: float | None = DEFAULT_MARGIN
    refuse_rate: float = DEFAULT_REFUSE_RATE
    feature_info: dict[str, dict] = field(default_factory=dict)
    progress: bool | None = None  # None: show a progress bar only on a terminal


def train_bundle(request: TrainRequest) -> Bundle:
    """Fit, evaluate on the holdout split and export; return the verified bundle."""
    gamma = _requested_gamma(request)
    if request.C is not None and not (math.isfinite(request.C) and request.C > 0):
        raise InputError(f"--C {request.C} must be a positive finite number")
    if not 0 < request.test_size < 1:
        raise InputError(f"--test-size {request.test_size} must be a fraction between 0 and 1")
    if not 0 <= request.seed < 2**32:
        raise InputError(f"--seed {request.seed} must be a whole number from 0 to 2**32 - 1")
    # Checked before the grid search, so a typo costs nothing.
    check_name(request.name, what="model name")
    check_name(request.version, what="model version")
    if Path(request.out).exists():
        raise InputError(f"{request.out}: already exists; choose a new --out directory or remove it first")
    table = read_table(request.data, target=request.target)
    check_feature_names(table.features)  # before the grid search, like the checks above
    labels = np.asarray(table.target)
    _check_classes(table, labels, request)
    _check_split(table, labels, request)
    X_train, X_test, y_train, y_test = train_test_split(
        table.values, labels, test_size=request.test_size, stratify=labels, random_state=request.seed
    )
    folds = StratifiedKFold(n_splits=_fold_count(y_train), shuffle=True, random_state=request.seed)
    search = _search(X_train, y_train, folds, gamma, request)
    pipeline = Pipeline([("scale", StandardScaler()), ("svc", SVC(kernel="rbf", C=search["C"], gamma=search["gamma"]))])
    if request.calibration == "none":
        model = pipeline.fit(X_train, y_train)
    else:
        model = CalibratedClassifierCV(pipeline, method=request.calibration, ensemble=False, cv=folds)
        model.fit(X_train, y_train)
    parts = take_apart(model)
    classes, counts = np.unique(y_train.astype(str), return_counts=True)
    export = ExportRequest(
        parts=parts,
        features=table.features,
        reference=X_train,
        reference_labels=None,
        reference_file=str(request.data),
        reference_sha256=sha256_file(request.data),
        name=request.name,
        version=request.version,
        out=request.out,
        margin=request.margin,
        feature_info=request.feature_info,
        reference_role="training split (the holdout rows are excluded)",
        holdout=X_test,
        holdout_labels=y_test.tolist(),  # plain arrays: the model never saw names
        holdout_file=str(request.data),
        holdout_sha256=sha256_file(request.data),
        holdout_role=f"holdout split of the same file (test size {request.test_size}, seed {request.seed})",
        refuse_rate=request.refuse_rate,
        training={
            "split": {"test_size": request.test_size, "seed": request.seed, "stratified": True,
                      "training_rows": int(len(y_train)), "holdout_rows": int(len(y_test))},
            "class_counts": {str(label): int(count) for label, count in zip(classes, counts)},
            "search": search["record"],
            "calibration_method": request.calibration,
        },
    )
    return export_bundle(export)


def _requested_gamma(request: TrainRequest) -> float | None:
    if request.sigma is not None and request.gamma is not None:
        raise InputError("give either --sigma or --gamma, not both (gamma = 1 / (2 sigma^2))")
    gamma = request.gamma
    if request.sigma is not None:
        if not (math.isfinite(request.sigma) and request.sigma > 0):
            raise InputError(f"--sigma {request.sigma} must be a positive finite number")
        with np.errstate(over="ignore", divide="ignore"):
            gamma = float(np.float64(1.0) / (2.0 * np.float64(request.sigma) ** 2))
        if not (math.isfinite(gamma) and gamma > 0):
            raise InputError(f"--sigma {request.sigma} gives gamma = {gamma}, which is not a usable number")
    elif gamma is not None and not (math.isfinite(gamma) and gamma > 0):
        raise InputError(f"--gamma {gamma} must be a positive finite number")
    return gamma


def _check_split(table: Table, labels: np.ndarray, request: TrainRequest) -> None:
    """scikit-learn's stratified split needs at least one row of every class on each side."""
    n_classes = len(np.unique(labels))
    holdout = math.ceil(request.test_size * len(labels))
    if holdout < n_classes or len(labels) - holdout < n_classes:
        raise InputError(
            f"--test-size {request.test_size} puts {holdout} of {len(labels)} rows in the holdout; each side of the "
            f"split needs at least one row of each of the {n_classes} classes; choose a test size between "
            f"{n_classes / len(labels):.3g} and {1 - n_classes / len(labels):.3g}"
        )


def _check_classes(table: Table, labels: np.ndarray, request: TrainRequest) -> None:
    classes, counts = np.unique(labels, return_counts=True)
    classes = classes.tolist()
    if len(classes) < 2:
        raise CsvError(table.path, f"has only one class ({classes[0]!r}); a classifier needs at least two", column=request.target)
    for label, count in zip(classes, counts.tolist()):
        if count < MIN_ROWS_PER_CLASS:
            first = int(np.flatnonzero(labels == label)[0]) + 1
            raise CsvError(
                table.path,
                f"class {label!r} has {count} rows (first at row {first}); at least {MIN_ROWS_PER_CLASS} per class "
                "are needed for a stratified split and cross-validation",
                column=request.target,
            )


def _fold_count(y_train: np.ndarray) -> int:
    smallest = int(np.unique(y_train, return_counts=True)[1].min())
    return max(2, min(_MAX_FOLDS, smallest))


def _search(X, y, folds, gamma: float | None, request: TrainRequest) -> dict[str, Any]:
    n_features = X.shape[1]
    gammas = [gamma] if gamma is not None else list(_GAMMA_FACTORS / n_features)
    costs = [request.C] if request.C is not None else list(_C_GRID)
    candidates = list(itertools.product(costs, gammas))
    if len(candidates) == 1:
        C, chosen = candidates[0]
        return {"C": C, "gamma": chosen, "record": {"grid": None, "C": C, "gamma": chosen}}
    results = []
    for C, candidate_gamma in tqdm(candidates, desc="grid search", unit="fit", disable=_quiet(request)):
        model = Pipeline([("scale", StandardScaler()), ("svc", SVC(kernel="rbf", C=C, gamma=candidate_gamma))])
        scores = cross_val_score(model, X, y, cv=folds, scoring="balanced_accuracy")
        results.append({"C": float(C), "gamma": float(candidate_gamma), "mean": float(scores.mean()), "std": float(scores.std())})
    best = max(results, key=lambda result: (result["mean"], -result["C"]))  # ties: the smoother, smaller C
    return {
        "C": best["C"],
        "gamma": best["gamma"],
        "record": {
            "scoring": "balanced_accuracy",
            "folds": folds.get_n_splits(),
            "grid": {"C": [float(c) for c in costs], "gamma": [float(g) for g in gammas]},
            "results": results,
            "C": best["C"],
            "gamma": best["gamma"],
        },
    }


def _quiet(request: TrainRequest) -> bool | None:
    return None if request.progress is None else not request.progress
