"""A bundle's description for operators and auditors (``rbfgate inspect``)."""

from __future__ import annotations

from typing import Any

from model_store.bundle import Bundle

__all__ = ["describe", "render_description"]


def describe(bundle: Bundle) -> dict[str, Any]:
    """JSON-safe summary: identity, classes, features (with kernel width in raw units), kernel, training."""
    manifest = bundle.manifest
    sigma = manifest.kernel.sigma
    features = []
    for feature, scale in zip(manifest.features, manifest.scaler.scale):
        features.append(
            {
                "name": feature.name,
                "unit": feature.unit,
                "description": feature.description,
                "allowed": list(feature.allowed),
                "training": feature.training.model_dump(),
                # One sigma in scaled space is sigma * scale raw units of this feature.
                "kernel_width_raw": sigma * abs(scale),
            }
        )
    training = manifest.training
    return {
        "name": manifest.name,
        "version": manifest.version,
        "digest": bundle.digest,
        "created": manifest.created,
        "creator": manifest.creator,
        "estimator": manifest.classifier.estimator,
        "classes": list(manifest.classifier.classes),
        "support_vectors_per_class": dict(zip(map(str, manifest.classifier.classes), manifest.classifier.support_per_class)),
        "kernel": {"gamma": manifest.kernel.gamma, "sigma": sigma},
        "scaler": manifest.scaler.kind,
        "calibration": manifest.calibration.method,
        "features": features,
        "holdout_metrics": _metrics(training.get("holdout_metrics")),
        "reference_metrics": _metrics(training.get("reference_metrics")),
        "reference": training.get("reference"),
        "libraries": training.get("libraries"),
    }


_SHOWN_METRICS = ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "log_loss", "brier_score")


def _metrics(value: Any) -> dict[str, Any] | None:
    """The numeric metrics of a training record; ``training`` is free-form, so keep only numbers."""
    if not isinstance(value, dict):
        return None
    kept = {name: value[name] for name in _SHOWN_METRICS if isinstance(value.get(name), (int, float))}
    if isinstance(value.get("rows"), int):
        kept["rows"] = value["rows"]
    if isinstance(value.get("confusion_matrix"), dict):
        kept["confusion_matrix"] = value["confusion_matrix"]
    return kept or None


def render_description(description: dict[str, Any]) -> str:
    """The description as aligned text."""
    lines = [
        f"{description['name']} {description['version']}",
        f"  digest       {description['digest']}",
        f"  created      {description['created']} by {description['creator']}",
        f"  model        {description['estimator']}, scaler {description['scaler']}, calibration {description['calibration']}",
        f"  classes      {', '.join(map(str, description['classes']))}",
        "  support      " + ", ".join(f"{label}: {count}" for label, count in description["support_vectors_per_class"].items()),
        f"  kernel       gamma {description['kernel']['gamma']:.6g}, sigma {description['kernel']['sigma']:.6g} (scaled units)",
        "  features     name, unit, allowed range, kernel width in raw units",
    ]
    for feature in description["features"]:
        low, high = feature["allowed"]
        unit = feature["unit"] or "-"
        lines.append(f"    {feature['name']:<24} {unit:<8} [{low:.6g}, {high:.6g}]  width {feature['kernel_width_raw']:.4g}")
    for title, key in (("holdout", "holdout_metrics"), ("reference", "reference_metrics")):
        metrics = description.get(key)
        if metrics:
            shown = ", ".join(f"{name} {metrics[name]:.4f}" for name in _SHOWN_METRICS if name in metrics)
            lines.append(f"  {title:<12} {shown} ({metrics.get('rows', '?')} rows)")
    libraries = description.get("libraries") or {}
    if libraries:
        lines.append("  libraries    " + ", ".join(f"{name} {version}" for name, version in libraries.items()))
    return "\n".join(lines)
