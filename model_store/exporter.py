"""Export a fitted scikit-learn RBF classifier to a bundle, then prove the bundle matches it.

The exporter reads the reference rows (usually the training data) to derive
allowed ranges, the reference distribution of nearest-support distance,
golden vectors and a fingerprint. After writing, it reloads the bundle with
the numpy scorer and compares it with scikit-learn on the golden vectors;
on any mismatch the output is removed and ``GoldenMismatchError`` raised.

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

import getpass
import platform
import shutil
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import sklearn
from sklearn.metrics import pairwise_distances_argmin_min

from model_store.bundle import Bundle, load_bundle, write_bundle
from model_store.errors import InputError
from model_store.estimator_parts import ModelParts, plain_arrays_accepted
from model_store.metrics import classification_metrics
from model_store.naming import check_name
from model_store.refusal import RECORD_ID

__all__ = [
    "DEFAULT_MARGIN",
    "GOLDEN_FROM_REFERENCE",
    "GOLDEN_SYNTHETIC",
    "ExportRequest",
    "check_feature_names",
    "export_bundle",
]

DEFAULT_MARGIN = 0.05
GOLDEN_FROM_REFERENCE = 32
GOLDEN_SYNTHETIC = 8
_QUANTILE_LEVELS = np.linspace(0.0, 1.0, 101)


@dataclass
class ExportRequest:
    """What to export: the model, its reference rows (raw units), and the bundle's identity.

    reference:        (n, f) float64, columns in ``features`` order
    reference_labels: n true labels, or None when the reference has no target
    """

    parts: ModelParts
    features: list[str]
    reference: np.ndarray
    reference_labels: list | None
    reference_file: str
    reference_sha256: str
    name: str
    version: str
    out: Path
    margin: float = DEFAULT_MARGIN
    feature_info: dict[str, dict] = field(default_factory=dict)
    reference_role: str = "reference data given to export"
    training: dict[str, Any] = field(default_factory=dict)
    creator: str | None = None


def export_bundle(request: ExportRequest) -> Bundle:
    """Write the bundle to ``request.out`` and verify it against scikit-learn; return it loaded."""
    check_name(request.name, what="model name")
    check_name(request.version, what="model version")
    if not 0 <= request.margin <= 10:
        raise InputError(f"--margin {request.margin} is outside [0, 10]; it is a fraction of each feature's range")
    check_feature_names(request.features)
    parts = request.parts
    if len(request.features) != parts.n_features:
        raise InputError(
            f"the model expects {parts.n_features} features, the reference has {len(request.features)}: {request.features}"
        )
    if parts.feature_names is not None and list(request.features) != parts.feature_names:
        # The reference rows are positional: they must be in the order the model was fitted on.
        raise InputError(
            f"the model was fitted on the columns {parts.feature_names}, the reference is given as "
            f"{list(request.features)}; pass the reference columns in the model's order"
        )
    unknown = sorted(set(request.feature_info) - set(request.features))
    if unknown:
        raise InputError(f"feature info names {unknown[0]!r}, which is not a feature; features are {request.features}")
    reference = request.reference
    golden_inputs = _golden_inputs(reference, request.reference_sha256)
    with plain_arrays_accepted():
        document = _document(request, golden_inputs)
        arrays = {
            "support_vectors.npy": parts.svc.support_vectors_,
            "dual_coef.npy": parts.svc.dual_coef_,
            "reference_quantiles.npy": _reference_quantiles(parts, reference),
        }
    out = write_bundle(request.out, document, arrays)
    try:
        bundle = load_bundle(out)
        bundle.self_test()
    except BaseException:  # a bundle that does not reproduce the model must not be left behind
        shutil.rmtree(out, ignore_errors=True)
        raise
    return bundle


def _document(request: ExportRequest, golden_inputs: np.ndarray) -> dict[str, Any]:
    parts = request.parts
    svc = parts.svc
    gamma = float(svc._gamma)  # the fitted number behind gamma='scale' or 'auto'
    return {
        "format": "rbfgate-bundle/1",
        "name": request.name,
        "version": request.version,
        "created": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "creator": request.creator or _user(),
        "features": _features(request),
        "scaler": {"kind": parts.scaler_kind, "center": parts.center.tolist(), "scale": parts.scale.tolist()},
        "kernel": {"kind": "rbf", "gamma": gamma, "sigma": float(1.0 / np.sqrt(2.0 * gamma))},
        "classifier": {
            "estimator": type(svc).__name__,
            "classes": parts.classes,
            "support_per_class": [int(count) for count in svc.n_support_],
            "intercepts": svc.intercept_.astype(float).tolist(),
            "break_ties": bool(svc.break_ties),
            "decision_function_shape": svc.decision_function_shape,
        },
        "calibration": parts.calibration,
        "training": _training(request),
        "reference_distance": {
            "space": "scaled",
            "rows": int(len(request.reference)),
            "quantile_levels": "0 to 1 in steps of 0.01, stored in reference_quantiles.npy",
        },
        "golden": _golden(parts, golden_inputs),
    }


def check_feature_names(features: list[str]) -> None:
    """Refuse a feature named like the record id member (``model_store.refusal.RECORD_ID``).

    Over HTTP a record's ``"id"`` is the caller's record id, echoed on its result and never
    scored; a feature of that name would make ``{"id": 7}`` mean two things.
    """
    if RECORD_ID in features:
        raise InputError(
            f"a feature is named {RECORD_ID!r}, which is reserved: over HTTP a record's {RECORD_ID!r} member is the "
            f"caller's record id, echoed on its result and never scored; rename that column (e.g. {RECORD_ID}_value) "
            "in the data and fit again"
        )


def _features(request: ExportRequest) -> list[dict[str, Any]]:
    reference = request.reference
    low, high = reference.min(axis=0), reference.max(axis=0)
    span = np.where(high > low, high - low, np.maximum(np.abs(low), 1.0))
    features = []
    for index, name in enumerate(request.features):
        info = request.feature_info.get(name, {})
        allowed = info.get("allowed") or _clip_to_bounds(
            [low[index] - request.margin * span[index], high[index] + request.margin * span[index]],
            info.get("bounds"),
        )
        features.append(
            {
                "name": name,
                "unit": info.get("unit"),
                "description": info.get("description"),
                "allowed": [float(allowed[0]), float(allowed[1])],
                "training": {
                    "min": float(low[index]),
                    "max": float(high[index]),
                    "mean": float(reference[:, index].mean()),
                    "std": float(reference[:, index].std()),
                },
            }
        )
    return features


def _clip_to_bounds(allowed: list[float], bounds: list[float] | None) -> list[float]:
    """Keep the widened range inside physical bounds (a humidity cannot pass 100 %RH)."""
    if bounds is None:
        return allowed
    return [max(allowed[0], bounds[0]), min(allowed[1], bounds[1])]


def _training(request: ExportRequest) -> dict[str, Any]:
    svc = request.parts.svc
    params = {key: _plain(value) for key, value in sorted(svc.get_params().items())}
    training = {
        "hyperparameters": params,
        "class_weight": {str(label): float(weight) for label, weight in zip(request.parts.classes, svc.class_weight_)},
        "fit_rows": int(svc.shape_fit_[0]),
        "reference": {
            "file": Path(request.reference_file).name,
            "sha256": request.reference_sha256,
            "rows": int(len(request.reference)),
            "role": request.reference_role,
        },
        "libraries": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scikit-learn": sklearn.__version__,
        },
        "notes": list(request.parts.notes),
    }
    if request.reference_labels is not None:
        labels, counts = np.unique(np.asarray(request.reference_labels, dtype=object).astype(str), return_counts=True)
        training["reference"]["class_counts"] = {str(label): int(count) for label, count in zip(labels, counts)}
        training["reference_metrics"] = classification_metrics(
            request.parts, request.reference, request.reference_labels
        ) | {"note": "computed on the reference rows, which may include training rows; not a holdout estimate"}
    training.update(request.training)
    return training


def _golden_inputs(reference: np.ndarray, fingerprint: str) -> np.ndarray:
    """Evenly spaced reference rows plus uniform random rows inside the reference box."""
    count = min(GOLDEN_FROM_REFERENCE, len(reference))
    picked = reference[np.unique(np.linspace(0, len(reference) - 1, count).round().astype(int))]
    rng = np.random.default_rng(int(fingerprint[:16], 16))
    synthetic = rng.uniform(reference.min(axis=0), reference.max(axis=0), size=(GOLDEN_SYNTHETIC, reference.shape[1]))
    return np.vstack([picked, synthetic])


def _golden(parts: ModelParts, inputs: np.ndarray) -> dict[str, Any]:
    decision, pairwise = parts.decisions(inputs)
    golden = {
        "inputs": inputs.tolist(),
        "labels": [_plain(label) for label in parts.estimator.predict(inputs)],
        "decisions": decision.astype(float).tolist(),
        "pairwise_decisions": None if pairwise is None else pairwise.astype(float).tolist(),
        "probabilities": None,
    }
    if parts.calibration["method"] != "none":
        golden["probabilities"] = parts.estimator.predict_proba(inputs).astype(float).tolist()
    return golden


def _reference_quantiles(parts: ModelParts, reference: np.ndarray) -> np.ndarray:
    # The scorer's own affine map and exact distance, so that a reference row scores at its rank:
    # scikit-learn's |x|^2 + |s|^2 - 2 x.s distance reports ~1e-7 for a row that is a support vector.
    support_vectors = parts.svc.support_vectors_
    scaled = (reference - parts.center) / parts.scale
    nearest, _ = pairwise_distances_argmin_min(scaled, support_vectors)
    difference = scaled - support_vectors[nearest]
    return np.quantile(np.sqrt(np.einsum("ij,ij->i", difference, difference)), _QUANTILE_LEVELS)


def _plain(value: Any) -> Any:
    """A JSON-safe version of a hyperparameter or label."""
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, dict):
        return {str(key): _plain(item) for key, item in value.items()}
    return repr(value)


def _user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"
