"""A request's distances reach the Prometheus histograms in one call per histogram, with the same result.

``service.metrics.observe_many`` puts a whole request's values into a histogram's buckets at
once (prometheus-client has no batch observe). The exposition it leads to must be the one that
observing each value on its own gives: the same cumulative bucket counts, the same count, and
the same sum up to the rounding of adding in another order. Values exactly on a bucket's upper
bound belong to that bucket (Prometheus' ``le``, "less than or equal", exposition format).
"""

from __future__ import annotations

import math
import time

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


# Requests are counted behind their answers (service.write_behind): in batches, one update per series.

def _observe_traffic(metrics: ServiceMetrics) -> None:
    rng = np.random.default_rng(11)
    for index in range(60):
        n = int(rng.integers(1, 30))
        metrics.observe_request("/score/{model}", ["POST", "BREW"][index % 2], [200, 422][index % 3 == 0], index / 1000)
        metrics.observe_scoring(
            "iris", ["1.0.0", "2.0.0"][index % 2], scored=n - index % 3, refused=index % 3,
            problems=[("sepal_length_cm", "out_of_range")] * (index % 3) + [("petal_width_cm", "missing")] * (index % 2),
            distances=rng.exponential(2.0, n), percentiles=rng.uniform(0, 100, n),
            verdicts=rng.choice(np.array(["typical", "unusual", "outside"], dtype=object), n),
        )


def _all_samples(metrics: ServiceMetrics) -> dict[str, float]:
    return {
        f"{sample.name}{sorted(sample.labels.items())}": sample.value
        for metric in metrics._collected() for sample in metric.samples if not sample.name.endswith("_created")
    }


def test_counting_in_batches_gives_the_exposition_of_counting_each_request_at_once():
    at_once, batched = ServiceMetrics(flush_seconds=0), ServiceMetrics(flush_seconds=3600)
    _observe_traffic(at_once)
    _observe_traffic(batched)
    want, got = _all_samples(at_once), _all_samples(batched)  # _collected counts the pending batch first
    assert got.keys() == want.keys()
    assert any("rbfgate_refusals_total" in key for key in want) and any("verdict" in key for key in want)
    for key, value in want.items():
        if "_sum" in key:
            assert math.isclose(got[key], value, rel_tol=1e-12), key
        else:
            assert got[key] == value, key


def _registry_total(metrics: ServiceMetrics, name: str) -> float:
    """The registry's own value, without counting what is pending."""
    return sum(sample.value for metric in metrics._registry.collect() for sample in metric.samples
               if sample.name == name)


def test_a_request_is_counted_by_the_next_scrape_even_before_the_interval():
    metrics = ServiceMetrics(flush_seconds=3600)
    metrics.observe_request("/score/{model}", "POST", 200, 0.001)
    assert _registry_total(metrics, "rbfgate_http_requests_total") == 0  # noted, not yet counted
    assert b'rbfgate_http_requests_total{method="POST",route="/score/{model}",status="200"} 1.0' in metrics.render()[0]


def test_a_request_is_counted_within_the_interval_without_a_scrape():
    metrics = ServiceMetrics(flush_seconds=0.02)
    metrics.observe_request("/score/{model}", "POST", 200, 0.001)
    deadline = time.monotonic() + 5
    while _registry_total(metrics, "rbfgate_http_requests_total") == 0 and time.monotonic() < deadline:
        time.sleep(0.01)
    assert _registry_total(metrics, "rbfgate_http_requests_total") == 1
