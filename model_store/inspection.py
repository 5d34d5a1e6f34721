"""A bundle's description for operators and auditors (``rbfgate inspect``)."""

from __future__ import annotations

import math
from typing import Any

from model_store.bundle import Bundle
from model_store.manifest import Manifest

__all__ = ["describe", "refusal_report_lines", "refusal_warning", "render_description"]

_RULES = ("refused_range", "refused_domain", "flagged_unusual", "refused_total")


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
                "non_negative": feature.non_negative,
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
        "holdout": training.get("holdout"),
        "libraries": training.get("libraries"),
        "domain": None if manifest.domain is None else manifest.domain.model_dump(),
        "refusal_report": None if manifest.refusal_report is None else manifest.refusal_report.model_dump(),
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
        inferred = "  (inferred non-negative)" if feature.get("non_negative") else ""
        lines.append(f"    {feature['name']:<24} {unit:<8} [{low:.6g}, {high:.6g}]  width {feature['kernel_width_raw']:.4g}"
                     + inferred)
    for title, key in (("holdout", "holdout_metrics"), ("reference", "reference_metrics")):
        metrics = description.get(key)
        if metrics:
            shown = ", ".join(f"{name} {metrics[name]:.4f}" for name in _SHOWN_METRICS if name in metrics)
            lines.append(f"  {title:<12} {shown} ({metrics.get('rows', '?')} rows)")
    lines.extend(_domain_lines(description.get("domain")))
    lines.extend(_report_lines(description.get("refusal_report")))
    libraries = description.get("libraries") or {}
    if libraries:
        lines.append("  libraries    " + ", ".join(f"{name} {version}" for name, version in libraries.items()))
    return "\n".join(lines)


def _domain_lines(domain: dict[str, Any] | None) -> list[str]:
    if domain is None:
        return ["  domain       none (a bundle of format rbfgate-bundle/1): answers carry domain null"]
    thresholds, calibration = domain["thresholds"], domain["calibration"]
    subsample = (f", a seeded subsample (seed {domain['subsample_seed']})" if domain["subsample_seed"] is not None
                 else "")
    return [
        f"  domain       one-class SVM (scikit-learn OneClassSVM, Schölkopf et al. 2001) on {domain['fit_rows']} of "
        f"{domain['reference_rows']} reference rows{subsample}, {_space(domain)}; gamma {domain['gamma']:.6g}, "
        f"nu {domain['nu']:g}, {domain['support_vectors']} support vectors",
        f"    score        the one-class decision: larger is more typical, below 0 outside the estimated support",
        f"    typical      score >= {thresholds['unusual_below']:.6g}",
        f"    unusual      {thresholds['outside_below']:.6g} <= score < {thresholds['unusual_below']:.6g} "
        f"(answered and flagged; about {100 * calibration['unusual_rate']:g} % of real rows)",
        f"    outside      score < {thresholds['outside_below']:.6g} (refused as outside_domain unless the operator "
        f"chose to flag only; {_outside_share(calibration)})",
        f"    thresholds   chosen on {calibration['rows']} {_SOURCES[calibration['source']]}",
    ]


def _space(domain: dict[str, Any]) -> str:
    whitening = domain.get("whitening")
    if whitening is None:
        return "scaled space"
    if whitening["shrinkage"] is None:
        return "scaled space (too few rows or no variance to whiten)"
    return f"scaled space whitened (Ledoit-Wolf covariance, shrinkage {whitening['shrinkage']:.3g})"


def _outside_share(calibration: dict[str, Any]) -> str:
    rate = f"{100 * calibration['refuse_rate']:g} %"
    if calibration["source"] == "cross-fitting":
        return f"set with the ranges so that both together refuse about {rate} of new rows"
    return f"about {rate} of real rows"


_SOURCES = {"holdout": "holdout rows", "cross-validation": "out-of-fold reference rows (no holdout was given)",
            "cross-fitting": "rows scored out of sample, with the range margin (see refusals)"}


def _report_lines(report: dict[str, Any] | None) -> list[str]:
    if report is None:
        return []
    lines = [f"  refusals     share of rows (target: about {100 * report['refuse_rate']:g} % of new rows refused)"]
    for title in ("reference", "holdout"):
        shares = report.get(title)
        if shares:
            lines.append(
                f"    {title:<12} {shares['rows']} rows: range {_percent(shares['refused_range'])}, domain "
                f"{_percent(shares['refused_domain'])}, flagged unusual {_percent(shares['flagged_unusual'])}, "
                f"refused in total {_percent(shares['refused_total'])} (rows the policy was derived from)"
            )
    sample = report.get("out_of_sample")
    if sample:
        estimate = sample["estimate"]
        how = (f"chosen so that the ranges take {100 * sample['range_share']:g} % of the refusal budget"
               if sample["margin_source"] == "chosen" else "given with --margin")
        lines.append(
            f"    new rows     estimated out of sample: range {_percent(estimate['refused_range'])}, domain "
            f"{_percent(estimate['refused_domain'])}, refused in total {_percent(estimate['refused_total'])} "
            f"({sample['method']} over {sample['rows']} rows, seed {sample['seed']})"
        )
        lines.append(f"    margin       {sample['margin']:.4g} x each feature's span ({how})")
    return lines


def _percent(share: float) -> str:
    return f"{100 * share:.1f} %"


def refusal_report_lines(manifest: Manifest) -> list[str]:
    """The refusal report as ``export`` and ``train`` print it (empty for a bundle without one)."""
    report = manifest.refusal_report
    return _report_lines(None if report is None else report.model_dump())


def refusal_warning(manifest: Manifest) -> str | None:
    """One line when the out-of-sample refusal estimate exceeds twice the target, saying why and what to do.

    When the rows refused in the estimate are no more than chance allows at the bound (one-sided
    Poisson tail of at least ``_CHANCE`` with mean 2 x refuse_rate x rows, common practice for rare
    counts), the dataset size is named as the cause; otherwise the rule that refuses most.
    """
    report = manifest.refusal_report
    sample = None if report is None else report.out_of_sample
    if sample is None or sample.estimate.refused_total <= 2 * report.refuse_rate:
        return None
    estimate, rows = sample.estimate, sample.rows
    refused = round(estimate.refused_total * rows)
    if _poisson_tail(refused, 2 * report.refuse_rate * rows) >= _CHANCE:
        cause = (f"{rows} rows are too few to tell this from the bound ({refused} rows refused, within chance "
                 f"of the {2 * report.refuse_rate * rows:.1f} the bound allows); give more rows (a larger "
                 "reference or a --holdout) or a larger --refuse-rate")
    elif estimate.refused_range >= estimate.refused_domain:
        cause = (f"the ranges refuse most ({_percent(estimate.refused_range)}); widen them with --margin or the "
                 "feature-info file's allowed/bounds")
    else:
        cause = (f"the domain model refuses most ({_percent(estimate.refused_domain)}); give more rows "
                 "or a lower --refuse-rate")
    return (f"the refusal policy is estimated to refuse {_percent(estimate.refused_total)} of new rows "
            f"({sample.method} over {rows} rows), more than twice --refuse-rate {report.refuse_rate:g}; {cause}")


_CHANCE = 0.05


def _poisson_tail(count: int, mean: float) -> float:
    """P(X >= count) for X ~ Poisson(mean)."""
    term = below = math.exp(-mean)  # P(X = 0); each next term is the last x mean / k
    for k in range(1, count):
        term *= mean / k
        below += term
    return max(0.0, 1.0 - below) if count > 0 else 1.0
