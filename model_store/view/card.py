"""The model card's content: what an auditor judges about one bundle, as one JSON-safe document.

    card = bundle_card(bundle, identity)     # identity: origin, signature and self-test facts

Everything comes from the verified bundle (its manifest and arrays); nothing is recomputed
from other sources. The served card (``GET /view/data/models/{model}/versions/{version}/card``)
and ``rbfgate card`` build the same document, and the same script (``assets/card.js``) draws it.
Metadata the manifest keeps as free-form training notes (metrics, reliability curves, feature
quantiles) is checked here before it is drawn; what does not have the expected shape is left
out with a note saying so, never drawn from guesses.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from model_store.bundle import GOLDEN_TOLERANCE, Bundle
from model_store.view import charts

__all__ = ["bundle_card", "golden_facts"]

_SCALAR_METRICS = ("rows", "accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "log_loss", "brier_score")


def bundle_card(bundle: Bundle, identity: Mapping[str, Any]) -> dict[str, Any]:
    """The card of ``bundle`` (already verified and self-tested by the caller, who says how in
    ``identity``: ``origin``, ``signature``, ``self_test``)."""
    manifest = bundle.manifest
    document = bundle.document
    training = manifest.training if isinstance(manifest.training, dict) else {}
    notes: list[str] = []
    metrics, metrics_source = _metrics(training, notes)
    features = _features(bundle, training, notes)
    quantiles = bundle.scorer.reference_quantiles
    card: dict[str, Any] = {
        "model": manifest.name,
        "version": manifest.version,
        "identity": {
            "bundle_sha256": bundle.digest,
            "format": manifest.format,
            "created": manifest.created,
            "creator": manifest.creator,
            "estimator": manifest.classifier.estimator,
            "scaler": manifest.scaler.kind,
            "kernel": {"gamma": manifest.kernel.gamma, "sigma": manifest.kernel.sigma},
            "calibration": manifest.calibration.method,
            "libraries": _libraries(training),
            "reference": _reference_facts(training),
            **dict(identity),
        },
        "classes": [
            {"label": label, "support_vectors": count}
            for label, count in zip(manifest.classifier.classes, manifest.classifier.support_per_class)
        ],
        "metrics": metrics,
        "metrics_source": metrics_source,
        "features": features,
        "distance": {
            "space": "scaled",
            "rows": document.get("reference_distance", {}).get("rows"),
            "median": float(quantiles[len(quantiles) // 2]),
            "p95": float(np.interp(0.95, np.linspace(0, 1, len(quantiles)), quantiles)),
            "p99": float(np.interp(0.99, np.linspace(0, 1, len(quantiles)), quantiles)),
            "max": float(quantiles[-1]),
        },
        "domain": None if manifest.domain is None else manifest.domain.model_dump(),
        "refusal_report": None if manifest.refusal_report is None else manifest.refusal_report.model_dump(),
        "notes": notes,
    }
    card["charts"] = _charts(card, metrics, quantiles, manifest.is_calibrated, notes)
    return card


def _charts(card, metrics, quantiles, calibrated: bool, notes: list[str]) -> dict[str, Any]:
    result: dict[str, Any] = {"confusion": None, "reliability": None, "features": {}, "distance": None, "domain": None}
    confusion = metrics.get("confusion_matrix") if metrics else None
    if confusion is not None:
        result["confusion"] = charts.confusion_matrix_chart(confusion["labels"], confusion["counts"],
                                                            title=f"confusion matrix ({card['metrics_source']})")
    reliability = metrics.get("reliability") if metrics else None
    if calibrated and reliability:
        result["reliability"] = charts.reliability_chart(reliability, title=f"reliability ({card['metrics_source']})")
    elif calibrated:
        notes.append("the bundle is calibrated but records no reliability curves (exported by an earlier rbfgate, "
                     "or without labelled rows); re-export it to see them")
    for feature in card["features"]:
        result["features"][feature["name"]] = charts.feature_strip_chart(
            feature["name"], feature["unit"], tuple(feature["allowed"]), feature["quantiles"], feature["training"],
            feature["kernel_width"], feature["inferred_low"],
        )
    domain = card["domain"]
    if domain is not None:
        result["domain"] = charts.domain_score_chart(domain["thresholds"]["unusual_below"], domain["thresholds"]["outside_below"])
    else:
        notes.append("the bundle has no domain model (format rbfgate-bundle/1): answers carry no domain verdict")
    percentiles = [{"distance": card["distance"]["p95"], "label": "95th percentile"},
                   {"distance": card["distance"]["p99"], "label": "99th percentile"}]
    result["distance"] = charts.distance_histogram_chart(quantiles, percentiles)
    return result


def _metrics(training: Mapping[str, Any], notes: list[str]) -> tuple[dict[str, Any] | None, str | None]:
    """Holdout metrics when the bundle has them, else those on the reference rows (said so)."""
    for key, source in (("holdout_metrics", "holdout rows"), ("reference_metrics", "reference rows, not a holdout")):
        found = training.get(key)
        if isinstance(found, dict):
            return _checked_metrics(found, notes), source
    notes.append("the bundle records no metrics (it was exported without labelled rows)")
    return None, None


def _checked_metrics(found: Mapping[str, Any], notes: list[str]) -> dict[str, Any]:
    metrics: dict[str, Any] = {
        name: found[name] for name in _SCALAR_METRICS if _finite(found.get(name))
    }
    confusion = found.get("confusion_matrix")
    if _confusion_ok(confusion):
        metrics["confusion_matrix"] = {"labels": list(confusion["labels"]), "counts": confusion["counts"]}
    elif confusion is not None:
        notes.append("the recorded confusion matrix is not a square table of counts; it is not drawn")
    reliability = found.get("reliability")
    if reliability is not None:
        curves = reliability.get("curves") if isinstance(reliability, dict) else None
        if isinstance(curves, list) and curves and all(_curve_ok(curve) for curve in curves):
            metrics["reliability"] = curves
        else:
            notes.append("the recorded reliability curves do not have the expected shape; they are not drawn")
    return metrics


def _features(bundle: Bundle, training: Mapping[str, Any], notes: list[str]) -> list[dict[str, Any]]:
    manifest = bundle.manifest
    quantiles = _feature_quantiles(training, manifest.feature_names, notes)
    sigma = manifest.kernel.sigma
    features = []
    for index, feature in enumerate(manifest.features):
        features.append({
            "name": feature.name,
            "unit": feature.unit,
            "description": feature.description,
            "allowed": list(feature.allowed),
            "training": feature.training.model_dump(),
            "quantiles": None if quantiles is None else {"levels": quantiles[0], "values": quantiles[1][feature.name]},
            # Along one feature, sigma in the scaled space is sigma x |scale| raw units.
            "kernel_width": sigma * abs(manifest.scaler.scale[index]),
            "inferred_low": 0.0 if feature.non_negative else None,
        })
    return features


def _feature_quantiles(training, names, notes) -> tuple[list[float], dict[str, list[float]]] | None:
    reference = training.get("reference")
    found = reference.get("feature_quantiles") if isinstance(reference, dict) else None
    if found is None:
        notes.append("the bundle records no per-feature quantiles of its reference rows (exported by an earlier "
                     "rbfgate); the strips show the allowed range and the kernel width only")
        return None
    levels = found.get("levels") if isinstance(found, dict) else None
    values = found.get("values") if isinstance(found, dict) else None
    ok = (
        isinstance(levels, list) and len(levels) >= 2 and all(_finite(level) and 0 <= level <= 1 for level in levels)
        and all(b > a for a, b in zip(levels, levels[1:]))
        and isinstance(values, dict) and set(values) == set(names)
        and all(isinstance(column, list) and len(column) == len(levels) and all(_finite(value) for value in column)
                and all(b >= a for a, b in zip(column, column[1:])) for column in values.values())
    )
    if not ok:
        notes.append("the recorded feature quantiles do not have the expected shape; the strips leave them out")
        return None
    return [float(level) for level in levels], {name: [float(value) for value in values[name]] for name in names}


def _libraries(training: Mapping[str, Any]) -> dict[str, str]:
    libraries = training.get("libraries")
    if not isinstance(libraries, dict):
        return {}
    return {str(name): str(version) for name, version in libraries.items()}


def _reference_facts(training: Mapping[str, Any]) -> dict[str, Any] | None:
    reference = training.get("reference")
    if not isinstance(reference, dict):
        return None
    return {key: reference.get(key) for key in ("file", "sha256", "rows", "role") if key in reference}


def _confusion_ok(confusion: Any) -> bool:
    if not isinstance(confusion, dict):
        return False
    labels, counts = confusion.get("labels"), confusion.get("counts")
    return (
        isinstance(labels, list) and isinstance(counts, list) and len(counts) == len(labels) > 0
        and all(isinstance(row, list) and len(row) == len(labels) for row in counts)
        and all(isinstance(cell, int) and not isinstance(cell, bool) and cell >= 0 for row in counts for cell in row)
    )


def _curve_ok(curve: Any) -> bool:
    if not isinstance(curve, dict):
        return False
    columns = [curve.get(key) for key in ("mean_predicted", "observed", "rows")]
    if not all(isinstance(column, list) for column in columns) or len({len(column) for column in columns}) != 1:
        return False
    predicted, observed, rows = columns
    return (
        all(_finite(value) and 0 <= value <= 1 for value in predicted + observed)
        and all(isinstance(count, int) and count > 0 for count in rows)
    )


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def golden_facts(bundle: Bundle) -> dict[str, Any]:
    """What the golden self-test checks; call it after ``bundle.self_test()`` passed."""
    golden = bundle.manifest.golden
    return {
        "passed": True,
        "vectors": len(golden.inputs),
        "checked": ["labels", "decisions"] + (["probabilities"] if golden.probabilities is not None else []),
        "tolerance": f"{GOLDEN_TOLERANCE:g} x max(1, |expected|)",
    }
