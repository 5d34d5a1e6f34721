"""What the exporter derives from the reference and holdout rows: ranges, distance quantiles, the refusal report.

Allowed ranges: an explicit ``allowed`` from the feature-info file wins; otherwise the range of
the reference and holdout rows together, widened by ``margin`` x its span on each side and clipped
to the feature's physical ``bounds``. A feature without ``bounds`` whose values are all >= 0 never
gets a negative lower bound (common practice: counts, areas and concentrations are non-negative),
recorded as ``non_negative`` in the manifest; give ``bounds`` for a feature that can go negative
(a temperature in degrees Celsius) and was only positive in the data.

``margin_needed`` is the same rule turned around: the smallest margin at which ranges derived from
some rows accept another row, which is how the exporter measures range refusals out of sample
(``model_store.policy_fit``).

Nearest-support distance quantiles: for each reference row, the distance to the nearest support
vector *other than itself* (a reference row within 1e-9 x max(1, |z|) of a support vector is that
support vector, so it is compared with the others; otherwise every support vector counts), and for
each holdout row the distance to the nearest support vector. Without that exclusion, about a quarter
of the distances are exactly 0 and a record sitting on a typical training row reads as unusual.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["QUANTILE_LEVELS", "feature_ranges", "leave_self_out_distances", "margin_needed", "refusal_shares"]

QUANTILE_LEVELS = np.linspace(0.0, 1.0, 101)
_SELF_TOLERANCE = 1e-9
_CHUNK_ROWS = 512


def feature_ranges(
    names: list[str], rows: np.ndarray, margin: float, feature_info: dict[str, dict]
) -> list[tuple[list[float], bool]]:
    """Per feature: ([low, high] allowed, whether 0 was inferred as the lower bound) from ``rows`` (n, f)."""
    low, high = rows.min(axis=0), rows.max(axis=0)
    span = np.where(high > low, high - low, np.maximum(np.abs(low), 1.0))
    ranges = []
    for index, name in enumerate(names):
        info = feature_info.get(name, {})
        if info.get("allowed"):
            ranges.append(([float(info["allowed"][0]), float(info["allowed"][1])], False))
            continue
        lower = low[index] - margin * span[index]
        upper = high[index] + margin * span[index]
        bounds = info.get("bounds")
        non_negative = bool(bounds is None and low[index] >= 0 and lower < 0)
        if non_negative:
            lower = 0.0
        if bounds is not None:  # physical limits: a humidity cannot pass 100 %RH
            lower, upper = max(lower, bounds[0]), min(upper, bounds[1])
        ranges.append(([float(lower), float(upper)], non_negative))
    return ranges


def margin_needed(names: list[str], fitted: np.ndarray, rows: np.ndarray, feature_info: dict[str, dict]) -> np.ndarray:
    """(m,) the smallest margin at which ``feature_ranges(names, fitted, margin, ...)`` accepts each of ``rows`` (m, f).

    ``fitted`` (n, f) are the rows the ranges are derived from. A row that no margin lets in (outside
    an explicit ``allowed`` range or the physical ``bounds``, or negative where the fitted rows infer
    a non-negative feature) needs ``inf``; a row inside the fitted min/max needs 0. A row is accepted
    at margin ``m`` exactly when its need is ``<= m`` (up to rounding in ``low - m x span``).
    """
    low, high = fitted.min(axis=0), fitted.max(axis=0)
    span = np.where(high > low, high - low, np.maximum(np.abs(low), 1.0))
    need = np.maximum(np.maximum((low - rows) / span, (rows - high) / span), 0.0)  # (m, f)
    for index, name in enumerate(names):
        info = feature_info.get(name, {})
        column = rows[:, index]
        if info.get("allowed"):
            low_allowed, high_allowed = info["allowed"]
            need[:, index] = np.where((column < low_allowed) | (column > high_allowed), np.inf, 0.0)
            continue
        bounds = info.get("bounds")
        if bounds is not None:
            need[(column < bounds[0]) | (column > bounds[1]), index] = np.inf
        elif low[index] >= 0:  # inferred non-negative: the lower bound never goes below 0
            need[column < 0, index] = np.inf
    return need.max(axis=1) if need.shape[1] else np.zeros(len(rows))


def leave_self_out_distances(scaled: np.ndarray, support_vectors: np.ndarray, *, exclude_self: bool) -> np.ndarray:
    """(n,) Euclidean distance of each ``scaled`` row (n, f) to the nearest support vector (n_sv, f).

    With ``exclude_self``, a row that coincides with a support vector is measured to the nearest
    other one. Distances are exact differences (not the expanded |x|^2 + |s|^2 - 2 x.s form, which
    reports ~1e-7 for a row on a support vector).
    """
    result = np.empty(len(scaled))
    support_sq = np.einsum("ij,ij->i", support_vectors, support_vectors)
    for start in range(0, len(scaled), _CHUNK_ROWS):
        chunk = scaled[start:start + _CHUNK_ROWS]
        # The expanded form picks candidates; the two nearest are then measured exactly.
        approx = np.einsum("ij,ij->i", chunk, chunk)[:, None] + support_sq[None, :] - 2.0 * chunk @ support_vectors.T
        take = min(2, len(support_vectors))
        candidates = np.argpartition(approx, take - 1, axis=1)[:, :take]
        difference = chunk[:, None, :] - support_vectors[candidates]
        exact = np.sqrt(np.einsum("ijk,ijk->ij", difference, difference))
        order = np.argsort(exact, axis=1)
        exact = np.take_along_axis(exact, order, axis=1)
        nearest = exact[:, 0]
        if exclude_self and take == 2:
            itself = nearest <= _SELF_TOLERANCE * np.maximum(1.0, np.linalg.norm(chunk, axis=1))
            nearest = np.where(itself, exact[:, 1], nearest)
        result[start:start + len(chunk)] = nearest
    return result


def refusal_shares(in_range: np.ndarray, score: np.ndarray | None, unusual_below: float, outside_below: float) -> dict[str, Any]:
    """The refusal report of ``n`` rows: (n,) bool range verdicts and (n,) one-class scores (None: no domain)."""
    rows = len(in_range)
    if rows == 0:
        return {"rows": 0, "refused_range": 0.0, "refused_domain": 0.0, "flagged_unusual": 0.0, "refused_total": 0.0}
    range_refused = ~in_range
    if score is None:
        outside = unusual = np.zeros(rows, bool)
    else:
        outside = in_range & (score < outside_below)
        unusual = in_range & (score >= outside_below) & (score < unusual_below)
    return {
        "rows": int(rows),
        "refused_range": float(range_refused.mean()),
        "refused_domain": float(outside.mean()),
        "flagged_unusual": float(unusual.mean()),
        "refused_total": float((range_refused | outside).mean()),
    }
