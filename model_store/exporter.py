"""Export a fitted scikit-learn RBF classifier to a bundle, then prove the bundle matches it.

The exporter reads the reference rows (usually the training data) and, when given, holdout rows
(not used in fitting) to derive allowed ranges, the reference distribution of nearest-support
distance, the domain model (``model_store.domain_fit``), the range margin and domain thresholds
chosen out of sample with an estimate of what they refuse (``model_store.policy_fit``), the
refusal report, golden vectors and a fingerprint; metrics are computed on the holdout when it has
labels. After writing, it reloads the bundle with the numpy scorer and compares it with
scikit-learn on the golden vectors (classifier and one-class decisions); on any mismatch the
output is removed and ``GoldenMismatchError`` raised.

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

from model_store.bundle import GOLDEN_TOLERANCE, Bundle, load_bundle, write_bundle
from model_store.client_names import client_name_warnings
from model_store.domain_fit import DEFAULT_REFUSE_RATE, UNUSUAL_RATE, FittedDomain, domain_spec, fit_one_class
from model_store.errors import GoldenMismatchError, InputError
from model_store.estimator_parts import ModelParts, plain_arrays_accepted
from model_store.manifest import FORMAT
from model_store.metrics import classification_metrics
from model_store.naming import check_name
from model_store.policy_fit import ChosenPolicy, choose_policy
from model_store.reference_rows import QUANTILE_LEVELS, feature_ranges, leave_self_out_distances, refusal_shares
from model_store.record_ids import RECORD_ID

__all__ = [
    "DEFAULT_MARGIN",
    "DEFAULT_REFUSE_RATE",
    "FEATURE_QUANTILE_LEVELS",
    "GOLDEN_FROM_REFERENCE",
    "GOLDEN_SYNTHETIC",
    "ExportRequest",
    "check_feature_names",
    "export_bundle",
]

DEFAULT_MARGIN: float | None = None  # chosen out of sample (model_store.policy_fit)
GOLDEN_FROM_REFERENCE = 32
GOLDEN_SYNTHETIC = 8
# Every 5 %, plus 1 % and 99 %: 23 numbers per feature keep the manifest small for wide models.
FEATURE_QUANTILE_LEVELS = np.unique(np.concatenate([np.linspace(0.0, 1.0, 21), [0.01, 0.99]])).round(4)


@dataclass
class ExportRequest:
    """What to export: the model, its reference rows (raw units), and the bundle's identity.

    reference:        (n, f) float64, columns in ``features`` order
    reference_labels: n true labels, or None when the reference has no target
    holdout:          (m, f) float64 rows not used in fitting, or None
    holdout_labels:   m true labels, or None
    margin:           range widening as a fraction of each feature's span; None: chosen out of sample
    refuse_rate:      the share of rows never seen at export that the whole refusal policy may refuse
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
    margin: float | None = DEFAULT_MARGIN
    feature_info: dict[str, dict] = field(default_factory=dict)
    reference_role: str = "reference data given to export"
    training: dict[str, Any] = field(default_factory=dict)
    creator: str | None = None
    holdout: np.ndarray | None = None
    holdout_labels: list | None = None
    holdout_file: str | None = None
    holdout_sha256: str | None = None
    holdout_role: str = "holdout rows given to export (not used in fitting)"
    refuse_rate: float = DEFAULT_REFUSE_RATE


def export_bundle(request: ExportRequest) -> Bundle:
    """Write the bundle to ``request.out`` and verify it against scikit-learn; return it loaded."""
    check_name(request.name, what="model name")
    check_name(request.version, what="model version")
    if request.margin is not None and not 0 <= request.margin <= 10:
        raise InputError(f"--margin {request.margin} is outside [0, 10]; it is a fraction of each feature's range "
                         "(leave it out to have it chosen from the data)")
    check_feature_names(request.features)
    if not 0 <= request.refuse_rate < 0.5:
        raise InputError(f"--refuse-rate {request.refuse_rate} is outside [0, 0.5); it is the share of new rows "
                         "the refusal policy should refuse, e.g. 0.01")
    if request.holdout is not None and request.holdout.shape[1] != request.reference.shape[1]:
        raise InputError(f"the holdout has {request.holdout.shape[1]} feature columns, the reference "
                         f"{request.reference.shape[1]}; give both files the same columns")
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
    policy, domain = _fit_policy(request)
    ranges = feature_ranges(request.features, _rows_seen(request), policy.margin, request.feature_info)
    with plain_arrays_accepted():
        document = _document(request, golden_inputs, ranges, domain, policy)
        arrays = {
            "support_vectors.npy": parts.svc.support_vectors_,
            "dual_coef.npy": parts.svc.dual_coef_,
            "reference_quantiles.npy": _reference_quantiles(parts, reference, request.holdout),
            **domain.arrays,
        }
    out = write_bundle(request.out, document, arrays)
    try:
        bundle = load_bundle(out)
        bundle.self_test()
        _check_domain(bundle, domain, golden_inputs, parts)
    except BaseException:  # a bundle that does not reproduce the model must not be left behind
        shutil.rmtree(out, ignore_errors=True)
        raise
    return bundle


def _rows_seen(request: ExportRequest) -> np.ndarray:
    if request.holdout is None or len(request.holdout) == 0:
        return request.reference
    return np.vstack([request.reference, request.holdout])


def _scaled(parts: ModelParts, raw: np.ndarray) -> np.ndarray:
    """The scorer's own affine map, so that exported statistics are what the scorer will see."""
    return (raw - parts.center) / parts.scale


def _in_range(raw: np.ndarray, ranges) -> np.ndarray:
    low = np.array([allowed[0] for allowed, _ in ranges])
    high = np.array([allowed[1] for allowed, _ in ranges])
    return ((raw >= low) & (raw <= high)).all(axis=1)


def _fit_policy(request: ExportRequest) -> tuple[ChosenPolicy, FittedDomain]:
    """The domain model, then the margin and thresholds chosen on cross-fitted rows (``model_store.policy_fit``)."""
    parts = request.parts
    seed = int(request.reference_sha256[:8], 16)
    scaled_reference = _scaled(parts, request.reference)
    scaled_holdout = None if request.holdout is None else _scaled(parts, request.holdout)
    one_class = fit_one_class(scaled_reference, seed)
    policy = choose_policy(request.features, _rows_seen(request), scaled_reference, scaled_holdout, one_class,
                           feature_info=request.feature_info, refuse_rate=request.refuse_rate,
                           margin=request.margin, seed=seed)
    calibration = {"source": "cross-fitting", "rows": policy.record["rows"], "refuse_rate": float(request.refuse_rate),
                   "unusual_rate": UNUSUAL_RATE}
    thresholds = {"unusual_below": policy.unusual_below, "outside_below": policy.outside_below}
    return policy, domain_spec(one_class, thresholds, calibration)


def _refusal_report(request: ExportRequest, ranges, domain: FittedDomain, policy: ChosenPolicy) -> dict[str, Any]:
    thresholds = domain.spec["thresholds"]
    report: dict[str, Any] = {"refuse_rate": float(request.refuse_rate), "holdout": None,
                              "out_of_sample": policy.record}
    for key, rows in (("reference", request.reference), ("holdout", request.holdout)):
        if rows is None:
            continue
        score = domain.decision(_scaled(request.parts, rows))
        report[key] = refusal_shares(_in_range(rows, ranges), score, thresholds["unusual_below"],
                                     thresholds["outside_below"])
    return report


def _check_domain(bundle: Bundle, domain: FittedDomain, golden_inputs: np.ndarray, parts: ModelParts) -> None:
    """The bundle's one-class decision on the golden inputs must be scikit-learn's."""
    ours = bundle.score(golden_inputs).domain_score
    want = domain.decision(_scaled(parts, golden_inputs))
    within = np.abs(ours - want) <= GOLDEN_TOLERANCE * np.maximum(1.0, np.abs(want))
    if not within.all():
        row = int(np.argmin(within))
        raise GoldenMismatchError(
            f"{bundle.source}: golden vector {row}: domain score {ours[row]!r}, scikit-learn's OneClassSVM gives "
            f"{want[row]!r}; the bundle does not reproduce its domain model"
        )


def _document(request: ExportRequest, golden_inputs: np.ndarray, ranges, domain: FittedDomain,
              policy: ChosenPolicy) -> dict[str, Any]:
    parts = request.parts
    svc = parts.svc
    gamma = float(svc._gamma)  # the fitted number behind gamma='scale' or 'auto'
    return {
        "format": FORMAT,
        "name": request.name,
        "version": request.version,
        "created": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "creator": request.creator or _user(),
        "features": _features(request, ranges),
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
            "rows": int(len(request.reference)) + (0 if request.holdout is None else int(len(request.holdout))),
            "from": "reference rows (each measured to the nearest support vector other than itself)"
            + ("" if request.holdout is None else " and holdout rows"),
            "quantile_levels": "0 to 1 in steps of 0.01, stored in reference_quantiles.npy",
        },
        "golden": _golden(parts, golden_inputs),
        "domain": domain.spec,
        "refusal_report": _refusal_report(request, ranges, domain, policy),
    }


def check_feature_names(features: list[str]) -> None:
    """Refuse a feature named like the record id member (``model_store.record_ids.RECORD_ID``).

    Over HTTP a record's ``"id"`` is the caller's record id, echoed on its result and never
    scored; a feature of that name would make ``{"id": 7}`` mean two things.
    """
    if RECORD_ID in features:
        raise InputError(
            f"a feature is named {RECORD_ID!r}, which is reserved: over HTTP a record's {RECORD_ID!r} member is the "
            f"caller's record id, echoed on its result and never scored; rename that column (e.g. {RECORD_ID}_value) "
            "in the data and fit again"
        )


def _features(request: ExportRequest, ranges) -> list[dict[str, Any]]:
    reference = request.reference
    low, high = reference.min(axis=0), reference.max(axis=0)
    features = []
    for index, name in enumerate(request.features):
        info = request.feature_info.get(name, {})
        allowed, non_negative = ranges[index]
        features.append(
            {
                "name": name,
                "unit": info.get("unit"),
                "description": info.get("description"),
                "allowed": [float(allowed[0]), float(allowed[1])],
                "non_negative": non_negative,
                "training": {
                    "min": float(low[index]),
                    "max": float(high[index]),
                    "mean": float(reference[:, index].mean()),
                    "std": float(reference[:, index].std()),
                },
            }
        )
    return features


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
            "feature_quantiles": _feature_quantiles(request),
        },
        "libraries": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scikit-learn": sklearn.__version__,
        },
        # Names a generated typed client cannot keep apart: warned about by the CLI, kept with the bundle.
        "notes": [*request.parts.notes, *client_name_warnings(request.features, request.parts.classes)],
    }
    if request.reference_labels is not None:
        labels, counts = np.unique(np.asarray(request.reference_labels, dtype=object).astype(str), return_counts=True)
        training["reference"]["class_counts"] = {str(label): int(count) for label, count in zip(labels, counts)}
        training["reference_metrics"] = classification_metrics(
            request.parts, request.reference, request.reference_labels
        ) | {"note": "computed on the reference rows, which may include training rows; not a holdout estimate"}
    if request.holdout is not None:
        training["holdout"] = {
            "file": None if request.holdout_file is None else Path(request.holdout_file).name,
            "sha256": request.holdout_sha256,
            "rows": int(len(request.holdout)),
            "role": request.holdout_role,
        }
        if request.holdout_labels is not None:
            training["holdout_metrics"] = classification_metrics(request.parts, request.holdout, request.holdout_labels)
    training.update(request.training)
    return training


def _feature_quantiles(request: ExportRequest) -> dict[str, Any]:
    """Per feature, the reference rows' quantiles (raw units) at ``FEATURE_QUANTILE_LEVELS``: the
    model card draws them as a strip beside the allowed range, without shipping any row."""
    values = np.quantile(request.reference, FEATURE_QUANTILE_LEVELS, axis=0)  # (levels, f)
    return {
        "levels": FEATURE_QUANTILE_LEVELS.tolist(),
        "values": {name: values[:, index].astype(float).tolist() for index, name in enumerate(request.features)},
    }


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


def _reference_quantiles(parts: ModelParts, reference: np.ndarray, holdout: np.ndarray | None) -> np.ndarray:
    """Quantiles of honest nearest-support distances (``model_store.reference_rows``)."""
    support_vectors = parts.svc.support_vectors_
    distances = [leave_self_out_distances(_scaled(parts, reference), support_vectors, exclude_self=True)]
    if holdout is not None and len(holdout):
        distances.append(leave_self_out_distances(_scaled(parts, holdout), support_vectors, exclude_self=False))
    return np.quantile(np.concatenate(distances), QUANTILE_LEVELS)


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
