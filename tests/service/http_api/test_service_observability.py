"""Metrics (Prometheus text format) and the one-JSON-line-per-request log.

The exposition text is parsed with prometheus-client's own parser
(``prometheus_client.parser.text_string_to_metric_families``), which follows the
Prometheus text exposition format. Histogram ``_count``/``_sum`` semantics: the
number of observations and their sum (Prometheus documentation, "Histogram").
"""

from __future__ import annotations

import json

import pytest
from prometheus_client.parser import text_string_to_metric_families

from .cases import bearer

# Distinctive values, so a leak into logs or metrics is unmistakable; inside iris's allowed ranges.
_RECORD = {
    "sepal_length_cm": 5.123456789, "sepal_width_cm": 3.14159265, "petal_length_cm": 1.41421356, "petal_width_cm": 0.2718281,
}
_SECRETS = ("5.123456789", "3.14159265", "1.41421356", "0.2718281")


def _samples(text: str) -> dict[tuple[str, frozenset], float]:
    return {
        (sample.name, frozenset(sample.labels.items())): sample.value
        for family in text_string_to_metric_families(text)
        for sample in family.samples
    }


def _sample(samples, name: str, **labels) -> float:
    """The value of one series; a series that is not exposed fails the test (it is not read as 0)."""
    key = (name, frozenset(labels.items()))
    if key not in samples:
        present = sorted(str(dict(labels_)) for series, labels_ in samples if series == name)
        raise AssertionError(f"no series {name}{labels}; exposed for {name}: {present}")
    return samples[key]


def _mixed_batch():
    out_of_range = dict(_RECORD, petal_width_cm=40.0)
    unknown = dict(_RECORD, colour=1.0)
    return {"records": [_RECORD, out_of_range, dict(_RECORD), unknown, dict(_RECORD)]}


def test_scoring_metrics_count_requests_records_and_refusals(make_client, shared_store):
    client = make_client(shared_store.root)
    body = client.post("/score/iris", json=_mixed_batch()).json()
    samples = _samples(client.get("/metrics").text)
    iris = {"model": "iris", "version": "1.0.0"}
    assert _sample(samples, "rbfgate_score_requests_total", outcome="partial", **iris) == 1
    assert _sample(samples, "rbfgate_records_total", status="scored", **iris) == 3
    assert _sample(samples, "rbfgate_records_total", status="refused", **iris) == 2
    assert _sample(samples, "rbfgate_refusals_total", feature="petal_width_cm", reason="out_of_range", **iris) == 1
    # A caller's unknown feature name never becomes a label value (no unbounded series).
    assert _sample(samples, "rbfgate_refusals_total", feature="(unknown)", reason="unknown_feature", **iris) == 1
    distances = [r["nearest_support"]["distance"] for r in body["results"] if r["status"] == "scored"]
    assert _sample(samples, "rbfgate_nearest_support_distance_count", **iris) == 3
    assert _sample(samples, "rbfgate_nearest_support_distance_sum", **iris) == pytest.approx(sum(distances), rel=1e-12)
    assert _sample(samples, "rbfgate_http_requests_total", route="/score/{model}", method="POST", status="200") == 1


def test_active_version_info_follows_a_switch(make_client, store, tokens, service_models):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "x", "accept_breaking": True}, headers=bearer(issued["operate"]))
    samples = _samples(client.get("/metrics").text)
    v1, v2 = service_models.iris1.bundle.digest, service_models.iris2.bundle.digest
    assert _sample(samples, "rbfgate_active_version_info", model="iris", version="2.0.0", digest=v2) == 1
    assert _sample(samples, "rbfgate_active_version_info", model="iris", version="1.0.0", digest=v1) == 0
    assert _sample(samples, "rbfgate_version_switches_total", model="iris") == 2  # the start-up load, then 2.0.0


def test_one_log_line_per_request_without_feature_values(make_client, shared_store):
    logs: list[dict] = []
    client = make_client(shared_store.root, logs=logs)
    client.post("/score/iris", json=_mixed_batch())
    client.post("/score/iris", json={"records": "nope"})
    client.get("/models/iris")
    requests = [event for event in logs if event["event"] == "request"]
    assert [(event["route"], event["status"]) for event in requests] == [
        ("/score/{model}", 200), ("/score/{model}", 422), ("/models/{model}", 200)
    ]
    first = requests[0]
    assert (first["model"], first["version"], first["records"], first["scored"], first["refused"]) == ("iris", "1.0.0", 5, 3, 2)
    assert first["refusals"] == {"out_of_range": 1, "unknown_feature": 1}
    text = json.dumps(logs)
    assert not any(secret in text for secret in _SECRETS)


def test_log_inputs_adds_the_records_to_the_log_line(make_client, shared_store):
    logs: list[dict] = []
    client = make_client(shared_store.root, logs=logs, log_inputs=True)
    client.post("/score/iris", json={"records": [_RECORD]})
    [event] = [event for event in logs if event["event"] == "request"]
    assert event["inputs"] == [_RECORD]


def test_health_and_metrics_reveal_no_feature_values(make_client, shared_store):
    client = make_client(shared_store.root)
    client.post("/score/iris", json=_mixed_batch())
    for route in ("/healthz", "/readyz", "/metrics"):
        text = client.get(route).text
        assert not any(secret in text for secret in _SECRETS), route


def test_fastapi_own_opentelemetry_export_stays_off_when_a_provider_is_set_up(make_client, shared_store, monkeypatch):
    # FastAPI releases with native telemetry (0.165 here) instrument every request once a tracer
    # provider is configured in the process; rbfgate switches that off (service.app), so such a
    # provider is never consulted.
    otel_trace = pytest.importorskip("opentelemetry.trace")
    consulted: list[str] = []

    class _ConfiguredProvider(otel_trace.TracerProvider):
        def get_tracer(self, *args, **kwargs):
            consulted.append("get_tracer")
            return otel_trace.NoOpTracer()

    def configured_provider():
        consulted.append("provider")
        return _ConfiguredProvider()

    monkeypatch.setattr(otel_trace, "get_tracer_provider", configured_provider)
    client = make_client(shared_store.root)
    assert client.post("/score/iris", json={"records": [_RECORD]}).status_code == 200
    assert client.get("/models/iris").status_code == 200
    assert consulted == []


def test_log_lines_are_json_objects_one_per_line():
    import io

    from service.log_lines import JsonLines

    stream = io.StringIO()
    write = JsonLines(stream)
    write({"event": "request", "status": 200})
    write({"event": "switch", "model": "iris"})
    write.flush()
    lines = stream.getvalue().splitlines()
    assert [json.loads(line)["event"] for line in lines] == ["request", "switch"]  # RFC 8259 objects
    assert all(json.loads(line)["time"].endswith("Z") for line in lines)  # RFC 3339 UTC timestamps
