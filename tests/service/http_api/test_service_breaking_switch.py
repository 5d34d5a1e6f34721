"""Over HTTP: the preview carries the contract comparison, activate refuses a breaking candidate with a
problem listing the breaking changes (RFC 9457 extension member ``breaking_changes``), and
``"accept_breaking": true`` lets it through, recorded in the history.

iris 1.0.0 is calibrated, iris 2.0.0 is not (conftest.py), so switching drops ``probability``.
"""

from __future__ import annotations

from .cases import GOOD_RECORD, assert_problem, bearer


def _operate(make_client, store, tokens):
    path, issued = tokens
    return make_client(store.root, tokens_file=path), bearer(issued["operate"]), bearer(issued["score"])


def test_activating_a_candidate_that_drops_calibration_is_409_listing_the_breaking_change(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "retrained"}, headers=operate)
    body = assert_problem(response, 409)
    assert body["type"] == "/problems/breaking-changes"
    assert [change.split(":")[0] for change in body["breaking_changes"]] == ["probability removed"]
    assert client.get("/models/iris", headers=operate).json()["active"]["version"] == "1.0.0"


def test_accept_breaking_activates_and_the_history_says_what_was_accepted(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    body = {"version": "2.0.0", "reason": "callers told on ticket OPS-7", "accept_breaking": True}
    response = client.post("/models/iris/activate", json=body, headers=operate)
    assert response.status_code == 200, response.text
    entry = response.json()["entry"]
    assert [change.split(":")[0] for change in entry["accepted_breaking"]] == ["probability removed"]
    history = client.get("/models/iris/history", headers=operate).json()
    assert history["entries"][-1] == entry and history["verification"]["ok"]


def test_accept_breaking_must_be_a_boolean(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "x", "accept_breaking": "yes"},
                           headers=operate)
    assert assert_problem(response, 422)["problems"][0]["pointer"] == "/accept_breaking"


def test_the_preview_shows_the_contract_comparison_on_recent_records(make_client, store, tokens):
    client, operate, score = _operate(make_client, store, tokens)
    client.post("/score/iris", json={"records": [GOOD_RECORD] * 3}, headers=score)
    report = client.post("/models/iris/preview", json={"version": "2.0.0"}, headers=operate).json()["report"]
    assert report["contract"]["recent_inputs"] == 3
    assert [change["kind"] for change in report["contract"]["changes"]] == ["probability_removed"]
