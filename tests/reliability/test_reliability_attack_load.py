"""Cheap attacks against real ``rbfgate serve`` processes (tests/reliability/attack_load.py).

The default suite runs each attack small, with generous functional bounds: health checks keep
being answered while refusal floods and slow reconnecting clients go on, concurrent large requests
beyond the scoring threads and queue get 503 with Retry-After as problem details (RFC 9110
sections 15.6.4 and 10.2.3, RFC 9457) and the memory they leave behind stays bounded. The tests
marked ``slow`` run the attacks at full size and print the figures the README's promises section
quotes (``python -m pytest -m slow tests/reliability/test_reliability_attack_load.py -s``).
Every loop is bounded in count and time and talks only to 127.0.0.1.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from http_api.cases import GOOD_RECORD
from http_api.conftest import build_store
from http_api.server import ServeProcess

from .attack_load import (
    concurrent_large_requests,
    cycle_pinned_versions,
    refusal_flood,
    slow_reconnecting_clients,
)

_GOOD_1000 = [GOOD_RECORD] * 1000


def _serve(workdir, store, *args, nofile: int | None = None) -> ServeProcess:
    server = ServeProcess(workdir, "--store", store.root, *args)
    if nofile is not None:
        server.args = ["prlimit", f"--nofile={nofile}:{nofile}", *server.args]  # util-linux prlimit(1)
    return server


@pytest.fixture(scope="module")
def attack_store(tmp_path_factory, service_models):
    return build_store(tmp_path_factory.mktemp("attack") / "store", service_models)


def test_health_checks_are_answered_while_refusal_floods_run(tmp_path, attack_store):
    with _serve(tmp_path, attack_store) as server:
        outcome = refusal_flood(server.url, GOOD_RECORD, clients=3, seconds=5)
    print(outcome.summary())
    assert outcome.health_failures == 0 and outcome.health_seconds
    assert len(outcome.good_seconds) == len(outcome.health_seconds)  # every one-record request scored
    assert set(outcome.flood_statuses) <= {422, 503}
    assert outcome.answer_bytes < 100 * 1024  # the bounded refusal answer, not 1,000 x 4 problems in full


def test_concurrent_large_requests_past_the_queue_get_503_with_retry_after(tmp_path, attack_store):
    with _serve(tmp_path, attack_store, "--scoring-threads", "1", "--scoring-queue", "4") as server:
        outcome = concurrent_large_requests(server.url, server.process.pid, _GOOD_1000, concurrent=40)
    print(outcome.summary())
    assert set(outcome.statuses) <= {200, 503} and outcome.statuses[200] >= 5 and outcome.statuses[503] >= 1
    assert outcome.retry_after == {"1"}
    assert outcome.problem_types == {("application/problem+json", "/problems/overloaded")}
    # Five requests at a time hold about 35 MB; the bound is generous for a noisy machine.
    assert outcome.resident_after_mib - outcome.resident_before_mib < 150


def test_slow_reconnecting_clients_do_not_lock_out_health_checks(tmp_path, attack_store):
    # 256 descriptors: the connection cap becomes 192, so the slow clients can never take them all.
    with _serve(tmp_path, attack_store, "--read-timeout", "20", nofile=256) as server:
        outcome = slow_reconnecting_clients("127.0.0.1", server.port, server.url, connections=320, seconds=6)
    print(outcome.summary())
    assert outcome.reconnects > 0  # the cap shed slow clients
    assert outcome.health_ok >= 0.8 * outcome.health_tried


@pytest.mark.slow
def test_full_size_refusal_flood_on_two_workers(tmp_path, attack_store):
    with _serve(tmp_path, attack_store, "--workers", "2") as server:
        outcome = refusal_flood(server.url, GOOD_RECORD, clients=4, seconds=20)
    print("refusal flood, 4 clients x 1,000 empty records, 2 workers:", outcome.summary())
    assert outcome.health_failures == 0


@pytest.mark.slow
def test_full_size_concurrent_large_requests_on_two_workers(tmp_path, attack_store):
    with _serve(tmp_path, attack_store, "--workers", "2") as server:
        outcome = concurrent_large_requests(server.url, server.process.pid, _GOOD_1000, concurrent=200, rounds=3)
    print("200 concurrent 1,000-record requests x 3, 2 workers:", outcome.summary())
    assert outcome.resident_peak_mib < 512  # the manifests' memory limit per pod


@pytest.mark.slow
def test_full_size_slow_reconnecting_clients(tmp_path, attack_store):
    with _serve(tmp_path, attack_store, nofile=256) as server:
        outcome = slow_reconnecting_clients("127.0.0.1", server.port, server.url, connections=400, seconds=45)
    print("400 slow reconnecting clients, 256 descriptors, 1 worker:", outcome.summary())
    assert outcome.health_ok >= 0.9 * outcome.health_tried


@pytest.mark.slow
def test_cycling_pinned_versions_of_a_large_model_stays_within_the_cache(tmp_path):
    from model_store import load_bundle
    from model_store.store import Store
    from tests.benchmarks.large_bundle import write_large_bundle

    store = Store(tmp_path / "store", create=True)
    versions = [f"1.0.{index}" for index in range(5)]
    bundles = [load_bundle(write_large_bundle(tmp_path / version, version=version, seed=11 + index))
               for index, version in enumerate(versions)]
    for bundle in bundles:
        store.publish(Path(bundle.source), actor="attack")
    store.activate("large", versions[0], reason="first", actor="attack")
    # A record inside every range of its own version (the versions are drawn from different seeds).
    records = {bundle.version: {feature.name: sum(feature.allowed) / 2 for feature in bundle.manifest.features}
               for bundle in bundles[1:]}
    loaded_mib = bundles[0].resident_bytes / 2**20
    del bundles
    with _serve(tmp_path, store) as server:
        before, after, statuses = cycle_pinned_versions(server.url, server.process.pid, "large", records, rounds=3)
    print(f"pinned cycling of 4 versions of 100,000 x 50 (each {loaded_mib:.0f} MiB loaded), "
          f"1 worker: resident {before:.0f} MiB before, {after:.0f} MiB after, answers {dict(statuses)}")
    assert set(statuses) == {200}
    assert after - before < 128 + 2 * loaded_mib  # the cache budget plus a load in flight
