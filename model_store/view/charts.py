"""Vega-Lite 6 specifications of every plot the pages and the model card draw.

Each function returns a plain JSON-safe dict (a Vega-Lite specification with its data inline);
the browser compiles and renders it with the vendored Vega files (``assets/vendor``). Plots that
show a record the user is trying carry an empty named data set ``record``, which the try page
fills in (``view.data("record", [...])``), so the same specification serves the card and the
try page.

Units: feature values in the feature's raw unit; distances in the scaled space the kernel
works in (one unit is one training standard deviation for a standard scaler).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = [
    "RECORD_DATA",
    "change_distribution_chart",
    "confusion_matrix_chart",
    "distance_histogram_chart",
    "domain_score_chart",
    "feature_strip_chart",
    "reliability_chart",
    "timeline_chart",
    "traffic_chart",
]

RECORD_DATA = "record"  # the named data set the try page fills with the record's position
_SCHEMA = "https://vega.github.io/schema/vega-lite/v6.json"  # an identifier only; never fetched
_DISTANCE_BINS = 30
_ACCENT = "#c2410c"  # the record being tried
_CONFIG = {
    "font": "system-ui, -apple-system, 'Segoe UI', Roboto, sans-serif",
    "axis": {"labelFontSize": 11, "titleFontSize": 12, "grid": False},
    "legend": {"labelFontSize": 11, "titleFontSize": 12, "orient": "bottom"},
    "view": {"stroke": None},
    "title": {"fontSize": 13, "anchor": "start"},
}


def _spec(body: dict[str, Any], *, height: int) -> dict[str, Any]:
    """Common frame: the container's width (readable on a phone and a laptop), a fixed height."""
    return {"$schema": _SCHEMA, "width": "container", "height": height, "autosize": {"type": "fit-x", "contains": "padding"},
            "config": _CONFIG, **body}


def confusion_matrix_chart(labels: Sequence[Any], counts: Sequence[Sequence[int]], *, title: str) -> dict[str, Any]:
    """Heat map of ``counts`` (k, k), rows the true class, columns the predicted class."""
    values = []
    for row, truth in enumerate(labels):
        total = sum(counts[row]) or 1
        for column, predicted in enumerate(labels):
            values.append({"true": str(truth), "predicted": str(predicted), "count": int(counts[row][column]),
                           "share": counts[row][column] / total})
    order = [str(label) for label in labels]
    encode_x = {"field": "predicted", "type": "nominal", "sort": order, "title": "predicted class"}
    encode_y = {"field": "true", "type": "nominal", "sort": order, "title": "true class"}
    return _spec({
        "title": title,
        "data": {"values": values},
        "encoding": {"x": encode_x, "y": encode_y},
        "layer": [
            {"mark": "rect", "encoding": {
                "color": {"field": "share", "type": "quantitative", "title": "share of the true class",
                          "scale": {"scheme": "blues", "domain": [0, 1]}},
                "tooltip": [{"field": "true"}, {"field": "predicted"}, {"field": "count", "type": "quantitative"},
                            {"field": "share", "type": "quantitative", "format": ".1%"}]}},
            {"mark": {"type": "text", "fontSize": 12}, "encoding": {
                "text": {"field": "count", "type": "quantitative"},
                "color": {"condition": {"test": "datum.share > 0.5", "value": "white"}, "value": "#111"}}},
        ],
    }, height=max(120, 44 * len(labels)))


def reliability_chart(curves: Sequence[Mapping[str, Any]], *, title: str) -> dict[str, Any]:
    """Observed frequency against mean predicted probability per bin, one line per class, with
    the diagonal of perfect calibration; point size is the number of rows in the bin."""
    values = [
        {"class": str(curve["class"]), "predicted": predicted, "observed": observed, "rows": rows}
        for curve in curves
        for predicted, observed, rows in zip(curve["mean_predicted"], curve["observed"], curve["rows"])
    ]
    unit = {"type": "quantitative", "scale": {"domain": [0, 1]}}
    return _spec({
        "title": title,
        "layer": [
            {"data": {"values": [{"p": 0.0}, {"p": 1.0}]}, "mark": {"type": "line", "strokeDash": [4, 4], "color": "#888"},
             "encoding": {"x": {"field": "p", **unit, "title": "mean predicted probability"},
                          "y": {"field": "p", **unit, "title": "observed frequency"}}},
            {"data": {"values": values}, "mark": {"type": "line", "point": False},
             "encoding": {"x": {"field": "predicted", **unit}, "y": {"field": "observed", **unit},
                          "color": {"field": "class", "type": "nominal"}}},
            {"data": {"values": values}, "mark": {"type": "point", "filled": True},
             "encoding": {"x": {"field": "predicted", **unit}, "y": {"field": "observed", **unit},
                          "color": {"field": "class", "type": "nominal"},
                          "size": {"field": "rows", "type": "quantitative", "title": "rows in bin"},
                          "tooltip": [{"field": "class"}, {"field": "predicted", "type": "quantitative", "format": ".3f"},
                                      {"field": "observed", "type": "quantitative", "format": ".3f"},
                                      {"field": "rows", "type": "quantitative"}]}},
        ],
    }, height=240)


def feature_strip_chart(
    name: str,
    unit: str | None,
    allowed: tuple[float, float],
    quantiles: Mapping[str, Sequence[float]] | None,
    training: Mapping[str, float],
    kernel_width: float,
    inferred_low: float | None = None,
) -> dict[str, Any]:
    """One feature on one horizontal axis (raw units): the allowed range as a light band, the
    reference rows' quantiles as ticks (closer ticks: denser data), their 25-75 % box and median,
    the kernel width as a bar starting at the median, an inferred bound as a dashed line, and the
    tried record (data set ``record``: ``[{"value": x, "refused": bool}]``) as a diamond."""
    low, high = allowed
    axis_title = f"{name} ({unit})" if unit else name
    x = {"type": "quantitative", "title": axis_title, "scale": {"zero": False, "nice": False}}
    layers: list[dict[str, Any]] = [
        {"data": {"values": [{"low": low, "high": high, "what": "allowed range"}]},
         "mark": {"type": "rect", "color": "#dbeafe", "y": 6, "y2": 66},
         "encoding": {"x": {"field": "low", **x}, "x2": {"field": "high"},
                      "tooltip": [{"field": "what"}, {"field": "low", "type": "quantitative"},
                                  {"field": "high", "type": "quantitative"}]}},
    ]
    median = training["mean"]
    if quantiles is not None:
        levels, values = list(quantiles["levels"]), list(quantiles["values"])
        ticks = [{"level": f"{100 * level:g} %", "value": value} for level, value in zip(levels, values)]
        level_of = dict(zip(levels, values))
        median = level_of.get(0.5, median)
        layers.append({"data": {"values": ticks}, "mark": {"type": "tick", "color": "#1e3a8a", "thickness": 1.5,
                                                              "size": 26, "yOffset": 0},
                       "encoding": {"x": {"field": "value", **x}, "y": {"value": 36},
                                    "tooltip": [{"field": "level", "title": "reference quantile"},
                                                {"field": "value", "type": "quantitative", "title": "value"}]}})
        if 0.25 in level_of and 0.75 in level_of:
            layers.append({"data": {"values": [{"q1": level_of[0.25], "q3": level_of[0.75], "median": median}]},
                           "mark": {"type": "rect", "color": "#1e3a8a", "opacity": 0.25, "y": 26, "y2": 46},
                           "encoding": {"x": {"field": "q1", **x}, "x2": {"field": "q3"},
                                        "tooltip": [{"field": "q1", "type": "quantitative", "title": "25 %"},
                                                    {"field": "median", "type": "quantitative", "title": "median"},
                                                    {"field": "q3", "type": "quantitative", "title": "75 %"}]}})
    layers.append({"data": {"values": [{"start": median, "end": median + kernel_width, "width": kernel_width}]},
                   "mark": {"type": "rule", "color": "#15803d", "strokeWidth": 3, "y": 58},
                   "encoding": {"x": {"field": "start", **x}, "x2": {"field": "end"},
                                "tooltip": [{"field": "width", "type": "quantitative", "format": ".4g",
                                             "title": "kernel width sigma (raw units)"}]}})
    if inferred_low is not None:
        layers.append({"data": {"values": [{"bound": inferred_low}]},
                       "mark": {"type": "rule", "color": "#7c3aed", "strokeDash": [3, 3], "y": 0, "y2": 72},
                       "encoding": {"x": {"field": "bound", **x},
                                    "tooltip": [{"field": "bound", "type": "quantitative", "title": "inferred lower bound"}]}})
    layers.append({"data": {"name": RECORD_DATA, "values": []},
                   "mark": {"type": "point", "shape": "diamond", "filled": True, "size": 160, "y": 36,
                            "stroke": "white", "strokeWidth": 1},
                   "encoding": {"x": {"field": "value", **x},
                                "color": {"condition": {"test": "datum.refused", "value": "#b91c1c"}, "value": _ACCENT},
                                "tooltip": [{"field": "value", "type": "quantitative", "title": "this record"}]}})
    return _spec({"layer": layers}, height=72)


def distance_histogram_chart(
    reference_quantiles: np.ndarray,
    thresholds: Sequence[Mapping[str, Any]] = (),
) -> dict[str, Any]:
    """Share of reference rows by distance to the nearest support vector, in fixed-width bins.

    The bundle keeps the 101 quantiles (0, 1, ..., 100 %) of that distance; each bin's share
    is the rise of their piecewise-linear cumulative distribution across the bin. ``thresholds``
    are ``{"distance", "label"}`` lines drawn on top; the record being tried is the data set
    ``record``: ``[{"distance": d, "percentile": p}]``.
    """
    quantiles = np.asarray(reference_quantiles, dtype=np.float64)
    levels = np.linspace(0.0, 1.0, len(quantiles))
    top = float(quantiles[-1]) if quantiles[-1] > 0 else 1.0
    edges = np.linspace(0.0, top, _DISTANCE_BINS + 1)
    cumulative = np.interp(edges, quantiles, levels, left=0.0, right=1.0)
    if quantiles[0] == 0.0:  # rows at distance 0 (support vectors themselves) belong to the first bin
        cumulative[0] = 0.0
    shares = np.diff(cumulative)
    bars = [{"start": float(a), "end": float(b), "share": float(s)} for a, b, s in zip(edges[:-1], edges[1:], shares)]
    x = {"type": "quantitative", "title": "distance to the nearest support vector (scaled space)"}
    layers: list[dict[str, Any]] = [
        {"data": {"values": bars}, "mark": {"type": "rect", "color": "#64748b"},
         "encoding": {"x": {"field": "start", **x}, "x2": {"field": "end"},
                      "y": {"field": "share", "type": "quantitative", "title": "share of reference rows",
                            "axis": {"format": "%"}},
                      "tooltip": [{"field": "start", "type": "quantitative", "format": ".3f", "title": "from"},
                                  {"field": "end", "type": "quantitative", "format": ".3f", "title": "to"},
                                  {"field": "share", "type": "quantitative", "format": ".1%"}]}},
    ]
    if thresholds:
        rules = [{"distance": float(item["distance"]), "label": str(item["label"])} for item in thresholds]
        layers.append({"data": {"values": rules}, "mark": {"type": "rule", "strokeDash": [5, 3], "color": "#7c3aed"},
                       "encoding": {"x": {"field": "distance", **x}, "tooltip": [{"field": "label"},
                                    {"field": "distance", "type": "quantitative", "format": ".3f"}]}})
        layers.append({"data": {"values": rules}, "mark": {"type": "text", "align": "left", "dx": 3, "dy": -4,
                                                             "color": "#7c3aed", "y": 8},
                       "encoding": {"x": {"field": "distance", **x}, "text": {"field": "label"}}})
    layers.append({"data": {"name": RECORD_DATA, "values": []},
                   "mark": {"type": "rule", "color": _ACCENT, "strokeWidth": 3},
                   "encoding": {"x": {"field": "distance", **x},
                                "tooltip": [{"field": "distance", "type": "quantitative", "format": ".3f",
                                             "title": "this record"},
                                            {"field": "percentile", "type": "quantitative", "format": ".1f",
                                             "title": "percentile among reference rows"}]}})
    return _spec({"layer": layers}, height=180)


def domain_score_chart(unusual_below: float, outside_below: float) -> dict[str, Any]:
    """The domain model's score axis with the service's two thresholds: below ``outside_below`` a
    record is outside (refused unless the operators chose to flag), below ``unusual_below``
    unusual, above it typical. The bundle keeps no distribution of reference scores, so the plot
    shows the verdict regions, and the tried record (data set ``record``: ``[{"score", "verdict"}]``)."""
    span = max(unusual_below - outside_below, abs(unusual_below) * 0.5, 1e-6)
    low, high = outside_below - 2 * span, unusual_below + 3 * span
    regions = [
        {"from": low, "to": outside_below, "verdict": "outside"},
        {"from": outside_below, "to": unusual_below, "verdict": "unusual"},
        {"from": unusual_below, "to": high, "verdict": "typical"},
    ]
    x = {"type": "quantitative", "title": "domain score (one-class SVM decision; higher is more typical)",
         "scale": {"zero": False, "nice": False}}
    color = {"field": "verdict", "type": "nominal", "title": "verdict",
             "scale": {"domain": ["outside", "unusual", "typical"], "range": ["#fecaca", "#fde68a", "#bbf7d0"]}}
    thresholds = [{"score": outside_below, "label": "outside below"}, {"score": unusual_below, "label": "unusual below"}]
    return _spec({"layer": [
        {"data": {"values": regions}, "mark": {"type": "rect", "y": 4, "y2": 46},
         "encoding": {"x": {"field": "from", **x}, "x2": {"field": "to"}, "color": color,
                      "tooltip": [{"field": "verdict"}, {"field": "from", "type": "quantitative", "format": ".4g"},
                                  {"field": "to", "type": "quantitative", "format": ".4g"}]}},
        {"data": {"values": thresholds}, "mark": {"type": "rule", "color": "#7c3aed", "strokeWidth": 2, "y": 0, "y2": 50},
         "encoding": {"x": {"field": "score", **x}, "tooltip": [{"field": "label", "title": "threshold"},
                                                                  {"field": "score", "type": "quantitative", "format": ".4g"}]}},
        {"data": {"name": RECORD_DATA, "values": []},
         "mark": {"type": "point", "shape": "diamond", "filled": True, "size": 160, "y": 25, "color": _ACCENT,
                  "stroke": "white", "strokeWidth": 1},
         "encoding": {"x": {"field": "score", **x}, "tooltip": [{"field": "score", "type": "quantitative", "title": "this record"},
                                                                  {"field": "verdict"}]}},
    ]}, height=50)


def timeline_chart(intervals: Sequence[Mapping[str, Any]], switches: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Which version was live when (bars, UTC time axis) and each switch (points with who, why, via)."""
    versions = sorted({item["version"] for item in intervals} | {item["version"] for item in switches})
    time = {"type": "temporal", "title": "time (UTC)", "scale": {"type": "utc"}, "axis": {"format": "%Y-%m-%d %H:%M"}}
    y = {"field": "version", "type": "nominal", "title": "version", "sort": versions}
    return _spec({
        "layer": [
            {"data": {"values": list(intervals)}, "mark": {"type": "bar", "height": 14, "cornerRadius": 2},
             "encoding": {"x": {"field": "start", **time}, "x2": {"field": "end"}, "y": y,
                          "color": {"field": "version", "type": "nominal", "legend": None},
                          "tooltip": [{"field": "version"}, {"field": "start", "title": "live from"},
                                      {"field": "until", "title": "until"}]}},
            {"data": {"values": list(switches)}, "mark": {"type": "point", "filled": True, "size": 90, "color": "#111"},
             "encoding": {"x": {"field": "time", **time}, "y": y,
                          "shape": {"field": "action", "type": "nominal", "title": "switch"},
                          "tooltip": [{"field": "time"}, {"field": "action"}, {"field": "version"},
                                      {"field": "actor", "title": "who"}, {"field": "reason", "title": "why"},
                                      {"field": "via", "title": "via"}]}},
        ],
    }, height=max(90, 34 * len(versions)))


def change_distribution_chart(distribution: Mapping[str, Any]) -> dict[str, Any]:
    """Rows by their largest change between the active version and the candidate, by row source."""
    edges = list(distribution["edges"])
    values = [
        {"source": source, "start": edges[index], "end": edges[index + 1], "rows": count}
        for source, counts in distribution["counts"].items()
        for index, count in enumerate(counts)
        if count
    ]
    measure = "probability (largest over the classes)" if distribution["measure"] == "probability" else "decision value"
    return _spec({
        "data": {"values": values},
        "mark": {"type": "bar"},
        "encoding": {
            "x": {"field": "start", "type": "quantitative", "bin": {"binned": True, "step": edges[1] - edges[0]},
                  "title": f"absolute change in {measure}", "scale": {"domain": [edges[0], edges[-1]]}},
            "x2": {"field": "end"},
            "y": {"aggregate": "sum", "field": "rows", "type": "quantitative", "title": "rows", "stack": "zero"},
            "color": {"field": "source", "type": "nominal", "title": "rows from"},
            "tooltip": [{"field": "source"}, {"field": "start", "type": "quantitative", "format": ".3f", "title": "from"},
                        {"field": "end", "type": "quantitative", "format": ".3f", "title": "to"},
                        {"field": "rows", "type": "quantitative", "aggregate": "sum"}],
        },
    }, height=200)


def traffic_chart(traffic: Mapping[str, Mapping[str, int]]) -> dict[str, Any]:
    """Records scored and refused per model since this worker started (``{model: {status: n}}``)."""
    values = [{"model": model, "status": status, "records": count}
              for model, counts in traffic.items() for status, count in counts.items() if count]
    return _spec({
        "data": {"values": values},
        "mark": {"type": "bar"},
        "encoding": {
            "y": {"field": "model", "type": "nominal", "title": None},
            "x": {"field": "records", "type": "quantitative", "title": "records since this worker started"},
            "color": {"field": "status", "type": "nominal", "title": "status",
                      "scale": {"domain": ["scored", "refused"], "range": ["#2563eb", "#b91c1c"]}},
            "tooltip": [{"field": "model"}, {"field": "status"}, {"field": "records", "type": "quantitative"}],
        },
    }, height=max(60, 36 * len(traffic)))
