"""Bounded answers and bounded work: the refusal summary, the scoring threads and their queue, and the
byte-bounded cache of pinned versions (in-process; the same limits under real load are in
tests/reliability/test_reliability_attack_load.py).

The refusal summary (service/refusal_answer.py) must let a client recover every record's problems:
the checks below rebuild them from the answer alone and compare with what the records lack, known
from the model's own feature list. Statuses: 503 with Retry-After (RFC 9110 sections 15.6.4 and
10.2.3), as RFC 9457 problem details.
"""

from __future__ import annotations

import asyncio
import json
import threading

import pytest

from service.admission import ScoringGate
from service.problems import ServiceProblem
from service.refusal_answer import DETAILED_PROBLEMS, NAMED_UNKNOWN_FEATURES

from .cases import GOOD_RECORD, assert_problem
from .conftest import IRIS_FEATURES


def _problems_by_record(answer: dict) -> dict[int, set[tuple]]:
    """Every record's (feature, reason) pairs, read from the summary's runs."""
    found: dict[int, set[tuple]] = {}
    for group in answer["refusals"]:
        for first, last in group["records"]:
            for index in range(first, last + 1):
                found.setdefault(index, set()).add((group["feature"], group["reason"]))
    return found


def test_a_thousand_empty_records_get_a_small_answer_that_still_names_every_problem(shared_client):
    body = json.dumps({"records": [{}] * 1000})  # 3 KB
    response = shared_client.post("/score/iris", content=body)
    answer = assert_problem(response, 422)
    # About 55 bytes per summarised record plus the detail budget; every problem written out in
    # full, in the results and again in the flat list, came to over 0.7 MB for four features.
    assert len(response.content) < 100 * 1024
    assert answer["summarised"] is True
    expected = {(feature, "missing") for feature in IRIS_FEATURES}
    assert _problems_by_record(answer) == {index: expected for index in range(1000)}
    results = answer["results"]
    assert all(result["problem_count"] == len(IRIS_FEATURES) for result in results)
    # The first records, as long as the budget lasts, carry their problems in full.
    detailed = [result for result in results if result["problems"] is not None]
    assert len(detailed) == DETAILED_PROBLEMS // len(IRIS_FEATURES)
    assert results[: len(detailed)] == detailed
    assert len(answer["problems"]) == len(detailed) * len(IRIS_FEATURES)


def test_a_few_refusals_are_listed_in_full_and_summarised_alike(shared_client):
    bad = {**GOOD_RECORD, "petal_length_cm": 100.0}
    response = shared_client.post("/score/iris", json={"records": [GOOD_RECORD, bad, bad, {}]})
    assert response.status_code == 200
    answer = response.json()
    assert answer["summarised"] is False
    assert [result["status"] for result in answer["results"]] == ["scored", "refused", "refused", "refused"]
    from_results = {
        index: {(problem["feature"], problem["reason"]) for problem in result["problems"]}
        for index, result in enumerate(answer["results"]) if result["status"] == "refused"
    }
    assert _problems_by_record(answer) == from_results
    [range_group] = [group for group in answer["refusals"] if group["reason"] == "out_of_range"]
    assert range_group["records"] == [[1, 2]] and range_group["count"] == 2


def test_unknown_names_past_the_named_limit_share_one_group(shared_client):
    record = {**GOOD_RECORD, **{f"extra_{index}": 1 for index in range(NAMED_UNKNOWN_FEATURES + 10)}}
    answer = assert_problem(shared_client.post("/score/iris", json={"records": [record]}), 422)
    unknown = [group for group in answer["refusals"] if group["reason"] == "unknown_feature"]
    assert len(unknown) == NAMED_UNKNOWN_FEATURES + 1
    [unnamed] = [group for group in unknown if group["feature"] is None]
    assert unnamed["count"] == 10 and unnamed["records"] == [[0, 0]]


@pytest.fixture
def busy_client(make_client, shared_store):
    """An app with one scoring thread and no queue, whose thread is held until the test releases it."""
    client = make_client(shared_store.root, scoring_threads=1, scoring_queue=0)
    gate = client.app.state.services.gate
    release = threading.Event()
    started = threading.Event()

    def hold() -> None:
        started.set()
        release.wait(60)

    client.portal.start_task_soon(gate.run, hold)
    assert started.wait(30)
    yield client
    release.set()


def test_many_records_in_a_small_body_need_a_scoring_thread_and_get_503_when_none_is_free(busy_client):
    response = busy_client.post("/score/iris", content=json.dumps({"records": [{}] * 1000}))
    problem = assert_problem(response, 503)
    assert response.headers["Retry-After"] == "1"
    assert problem["type"] == "/problems/overloaded"


def test_small_requests_health_and_readiness_are_answered_while_every_scoring_thread_is_busy(busy_client):
    assert busy_client.post("/score/iris", json={"records": [GOOD_RECORD]}).status_code == 200
    assert busy_client.get("/healthz").status_code == 200
    assert busy_client.get("/readyz").status_code == 200


def test_pinned_scoring_waits_for_a_scoring_thread_too(busy_client):
    response = busy_client.post("/score/iris/versions/2.0.0", json={"records": [GOOD_RECORD]})
    assert_problem(response, 503)


def test_a_request_cancelled_while_queued_gives_its_place_back():
    async def scenario() -> int:
        gate = ScoringGate(threads=1, queue=1)
        release = threading.Event()
        running = asyncio.ensure_future(gate.run(lambda: release.wait(30)))
        await asyncio.sleep(0.05)
        queued = asyncio.ensure_future(gate.run(lambda: None))
        await asyncio.sleep(0.05)
        with pytest.raises(ServiceProblem):  # one running, one queued: full
            await gate.run(lambda: None)
        queued.cancel()
        await asyncio.sleep(0.05)
        release.set()
        await running
        gate.close()
        return gate.admitted

    assert asyncio.run(scenario()) == 0


def test_the_pinned_version_cache_is_bounded_by_bytes(make_client, shared_store):
    versions = [info.version for info in shared_store.versions("iris")]
    client = make_client(shared_store.root)
    registry = client.app.state.services.registry
    sizes = {version: registry.pinned("iris", version).bundle.resident_bytes for version in versions}
    budget = max(sizes.values())  # room for the largest one alone
    small = make_client(shared_store.root, pinned_cache_bytes=budget)
    small_registry = small.app.state.services.registry
    for version in versions * 2:
        assert small.post(f"/score/iris/versions/{version}", json={"records": [GOOD_RECORD]}).status_code == 200
        assert small_registry.pinned_cache()[1] <= budget
    assert small_registry.pinned_cache()[0] == 1  # the active version is served from the table, not the cache


def test_a_version_larger_than_the_cache_is_served_but_not_kept(make_client, shared_store):
    client = make_client(shared_store.root, pinned_cache_bytes=0)
    assert client.post("/score/iris/versions/2.0.0", json={"records": [GOOD_RECORD]}).status_code == 200
    assert client.app.state.services.registry.pinned_cache() == (0, 0)
