"""Soak: mixed scoring, refusals and version switches at a steady rate on two workers.

Excluded from the default run (``@pytest.mark.slow``). Run it with

    RBFGATE_SOAK_SECONDS=600 python3 -m pytest -m slow tests/reliability/test_reliability_soak.py -s

(600 s by default; a shorter value is fine for a local check). Promises: no request fails; every
answer carries the numbers of the version it names (scikit-learn's predict and decision_function
of that version's model for those rows, within the golden tolerance 1e-9 x max(1, |v|));
refused records name the feature pushed out of range; the metrics count every scoring request;
and the resident memory of the server processes at the end is within 10 % of what it was after
warm-up (the first tenth of the run, at least 30 s).
"""

from __future__ import annotations

import os
import random
import threading
import time

import httpx
import numpy as np
import pytest
from http_api.cases import bearer
from http_api.conftest import build_store
from http_api.reference import assert_close, sklearn_reference
from http_api.server import ServeProcess
from prometheus_client.parser import text_string_to_metric_families

from service.tokens import add_token

from .support import process_tree, resident_kib

pytestmark = pytest.mark.slow

_RATE_PER_THREAD = 10.0  # requests per second per client thread
_THREADS = 4
_SWITCH_SECONDS = 3.0
_WARM_UP_FRACTION = 0.1


def _check_scored(results, published, rows, what):
    reference = sklearn_reference(published.model, rows)  # scikit-learn's predict and decision_function
    classes = [str(label) for label in published.bundle.classes]
    assert [result["label"] for result in results] == reference["labels"].tolist(), what
    got = np.array([[result["decision"][label] for label in classes] if isinstance(result["decision"], dict)
                    else result["decision"] for result in results])
    assert_close(got, reference["decision"], f"{what}: decision_function")


def test_soak_mixed_traffic_with_switches(tmp_path, service_models):
    duration = float(os.environ.get("RBFGATE_SOAK_SECONDS", "600"))
    store = build_store(tmp_path / "store", service_models)
    tokens = tmp_path / "tokens.json"
    score = add_token(tokens, "soak-client", "score")[0]
    operate = add_token(tokens, "soak-operator", "operate")[0]
    versions = {"1.0.0": service_models.iris1, "2.0.0": service_models.iris2}
    iris_rows = service_models.iris1.X
    features = service_models.iris1.bundle.manifest.features
    cancer = service_models.cancer1
    stats = {"requests": 0, "scored": 0, "refused": 0, "switches": 0, "score_requests": 0}
    failures: list[str] = []
    lock = threading.Lock()
    stop = threading.Event()

    def fail(text):
        with lock:
            failures.append(text)

    def client_loop(seed):
        chance = random.Random(seed)
        with httpx.Client(base_url=server.url, timeout=30.0, headers=bearer(score)) as client:
            next_at = time.monotonic()
            while not stop.is_set():
                next_at += 1.0 / _RATE_PER_THREAD
                stop.wait(max(0.0, next_at - time.monotonic()))
                kind = chance.random()
                picked = iris_rows[sorted(chance.sample(range(len(iris_rows)), chance.randint(1, 20)))]
                records = versions["1.0.0"].records(picked)
                pushed = None
                if kind < 0.25:  # one record pushed out of range among good ones
                    feature = chance.choice(features)
                    pushed = (len(records), feature.name)
                    records = records + [dict(records[0], **{feature.name: feature.allowed[1] + 1.0})]
                elif kind < 0.35:  # every record refused
                    records = [dict(record, sepal_length_cm=-100.0) for record in records]
                try:
                    if kind > 0.9:
                        rows = cancer.X[chance.randrange(0, len(cancer.X) - 5):][:5]
                        response = client.post("/score/cancer", json={"records": cancer.records(rows)})
                        target, published, checked_rows = "cancer", cancer, rows
                    else:
                        response = client.post("/score/iris", json={"records": records})
                        target, published, checked_rows = "iris", None, picked
                except httpx.HTTPError as exc:
                    fail(f"transport: {exc!r}")
                    continue
                with lock:
                    stats["requests"] += 1
                    stats["score_requests"] += 1
                all_refused = 0.25 <= kind < 0.35 and target == "iris"
                if response.status_code != (422 if all_refused else 200):
                    fail(f"{target}: {response.status_code} {response.text[:200]}")
                    continue
                body = response.json()
                published = published or versions.get(body["version"])
                if published is None or body["bundle_sha256"] != published.bundle.digest:
                    fail(f"unknown version {body.get('version')} / {body.get('bundle_sha256')}")
                    continue
                results = body["results"]
                try:
                    if all_refused:
                        assert all(r["status"] == "refused" and r["problems"][0]["feature"] == "sepal_length_cm"
                                   for r in results)
                    else:
                        _check_scored(results[: len(checked_rows)], published, checked_rows, f"{target} {body['version']}")
                        if pushed is not None:
                            index, name = pushed
                            assert results[index]["status"] == "refused"
                            assert [(p["feature"], p["reason"]) for p in results[index]["problems"]] == [(name, "out_of_range")]
                except AssertionError as exc:
                    fail(f"wrong answer: {exc}")
                    continue
                with lock:
                    stats["scored"] += sum(r["status"] == "scored" for r in results)
                    stats["refused"] += sum(r["status"] == "refused" for r in results)

    def operator_loop():
        with httpx.Client(base_url=server.url, timeout=60.0, headers=bearer(operate)) as client:
            target = "2.0.0"
            while not stop.wait(_SWITCH_SECONDS):
                response = client.post("/models/iris/activate", json={"version": target, "reason": "soak switch", "accept_breaking": True})
                if response.status_code != 200:
                    fail(f"activate {target}: {response.status_code} {response.text[:200]}")
                with lock:
                    stats["switches"] += 1
                target = "1.0.0" if target == "2.0.0" else "2.0.0"

    args = ("--store", store.root, "--tokens", tokens, "--workers", "2", "--poll-interval", "0.2")
    with ServeProcess(tmp_path, *args) as server:
        threads = [threading.Thread(target=client_loop, args=(seed,)) for seed in range(_THREADS)]
        threads.append(threading.Thread(target=operator_loop))
        started = time.monotonic()
        for thread in threads:
            thread.start()
        try:
            warm_up = max(30.0, _WARM_UP_FRACTION * duration)
            stop.wait(warm_up)
            warm_kib = resident_kib(process_tree(server.process.pid))
            stop.wait(max(0.0, duration - (time.monotonic() - started)))
            end_kib = resident_kib(process_tree(server.process.pid))
        finally:
            stop.set()
            for thread in threads:
                thread.join(120)
        with server.client() as client:
            metrics = client.get("/metrics").text
    counted = sum(sample.value for family in text_string_to_metric_families(metrics) for sample in family.samples
                  if sample.name == "rbfgate_score_requests_total")
    elapsed = time.monotonic() - started
    print(f"\nsoak: {elapsed:.0f} s, {stats['requests']} requests ({stats['requests'] / elapsed:.1f}/s), "
          f"{stats['scored']} records scored, {stats['refused']} refused, {stats['switches']} switches, "
          f"RSS after warm-up {warm_kib} KiB, at the end {end_kib} KiB ({100 * (end_kib / warm_kib - 1):+.1f} %)")
    assert failures == [], failures[:5]
    assert stats["switches"] >= 2 and stats["requests"] > 0
    assert counted == stats["score_requests"]
    assert end_kib <= 1.10 * warm_kib, (warm_kib, end_kib)
