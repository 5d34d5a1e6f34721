"""A request's distances reach the Prometheus histograms in one call per histogram, with the same result.

``service.metrics.observe_many`` puts a whole request's values into a histogram's buckets at
once (prometheus-client has no batch observe). The exposition it leads to must be the one that
observing each value on its own gives: the same cumulative bucket counts, the same count, and
the same sum up to the rounding of adding in another order. Values exactly on a bucket's upper
bound belong to that bucket (Prometheus' ``le``, "less than or equal", exposition format).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from service.metrics import DISTANCE_BUCKETS, ServiceMetrics, observe_many

_VALUES = {
    "on every bound, below the first and past the last": np.array([0.0, *DISTANCE_BUCKETS, 1e300]),
    "spread": np.random.default_rng(3).exponential(4.0, 1000),
    "one value": np.array([0.3]),
    "nine values, past the one-by-one limit": np.array([0.1, 0.125, 0.2, 1.0, 3.0, 8.0, 8.5, 64.0, 65.0]),
}


def _samples(metrics: ServiceMetrics) -> dict[str, float]:
    return {
        f"{sample.name}{sorted(sample.labels.items())}": sample.value
        for metric in metrics._collected() if metric.name == "rbfgate_nearest_support_distance"
        for sample in metric.samples if not sample.name.endswith("_created")
    }


@pytest.mark.parametrize("values", list(_VALUES.values()), ids=list(_VALUES))
def test_batch_observation_gives_the_exposition_of_one_observation_per_value(values):
    one_by_one, batched = ServiceMetrics(), ServiceMetrics()
    for value in values.tolist():
        one_by_one.distance.labels("m", "1").observe(value)
    observe_many(batched.distance.labels("m", "1"), values)
    want, got = _samples(one_by_one), _samples(batched)
    assert got.keys() == want.keys()
    for key, value in want.items():
        if "_sum" in key:
            assert math.isclose(got[key], value, rel_tol=1e-12)
        else:
            assert got[key] == value, key


def test_an_empty_batch_observes_nothing():
    metrics = ServiceMetrics()
    observe_many(metrics.distance.labels("m", "1"), np.empty(0))
    assert all(value == 0 for value in _samples(metrics).values())
