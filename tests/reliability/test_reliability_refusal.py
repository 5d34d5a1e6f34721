"""Any single feature pushed out of its allowed range is refused, never scored, by the CLI and the service.

Hypothesis draws a record inside the allowed box of iris 1.0.0 (three classes, calibrated) or
breast cancer 1.0.0 (binary, 30 features), then moves one feature out: just past the bound
(the next float, IEEE 754 ``nextafter``), a little, far, or to +-1e308. The record is sent next to
an in-range one, so the answer shows both outcomes. The refusal policy (README, "Concepts") is
inclusive bounds: a value is out of range exactly when it is < low or > high. A random point of
the box is often unlike every reference row, so the models only flag records outside their domain
here (``outside-domain flag``, ``--flag-outside``): this file checks the range rule alone.
"""

from __future__ import annotations

import csv
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from http_api.conftest import build_store
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from model_store.cli import main
from service.app import create_app
from service.settings import Settings

with warnings.catch_warnings():
    warnings.simplefilter("ignore", UserWarning)  # Starlette's note about the httpx2 fork
    from fastapi.testclient import TestClient

_SETTINGS = settings(max_examples=40, deadline=None, derandomize=True,
                     suppress_health_check=[HealthCheck.function_scoped_fixture])


@pytest.fixture(scope="module")
def served(tmp_path_factory, service_models):
    store = build_store(tmp_path_factory.mktemp("refusal") / "store", service_models)
    for name in ("iris", "cancer"):
        store.set_outside_action(name, "flag", reason="the range rule alone is under test", actor="test-setup")
    app = create_app(Settings(store_root=store.root, poll_seconds=3600.0), environ={}, write_log=lambda event: None)
    with TestClient(app, raise_server_exceptions=True) as client:
        yield client, {"iris": service_models.iris1.bundle, "cancer": service_models.cancer1.bundle}


@st.composite
def pushed_out(draw, bundles):
    """(model name, in-range record, out-of-range record, the feature pushed out, its new value)."""
    name = draw(st.sampled_from(sorted(bundles)))
    features = bundles[name].manifest.features
    fractions = draw(st.lists(st.floats(0, 1), min_size=len(features), max_size=len(features)))
    good = {f.name: min(f.allowed[1], f.allowed[0] + x * (f.allowed[1] - f.allowed[0])) for f, x in zip(features, fractions)}
    feature = draw(st.sampled_from(features))
    low, high = feature.allowed
    above = draw(st.booleans())
    bound, direction = (high, np.inf) if above else (low, -np.inf)
    span = high - low
    value = draw(st.sampled_from([
        float(np.nextafter(bound, direction)),  # the nearest float outside
        bound + (1e-6 * span if above else -1e-6 * span),
        bound + (span if above else -span),
        bound + (1e6 * span if above else -1e6 * span),
        1e308 if above else -1e308,
    ]))
    assert not low <= value <= high
    return name, good, {**good, feature.name: value}, feature, value


def test_a_feature_pushed_out_of_range_is_refused_by_the_service(served):
    client, bundles = served

    @_SETTINGS
    @given(case=pushed_out(bundles))
    def check(case):
        name, good, bad, feature, value = case
        response = client.post(f"/score/{name}", json={"records": [good, bad]})
        assert response.status_code == 200, response.text
        first, second = response.json()["results"]
        assert first["status"] == "scored"
        assert second == {"status": "refused", "problem_count": 1, "problems": [
            {"feature": feature.name, "value": value, "reason": "out_of_range", "allowed": list(feature.allowed)}
        ]}

    check()


def test_a_feature_pushed_out_of_range_is_refused_by_the_cli(served):
    _, bundles = served
    workdir = Path(tempfile.mkdtemp(prefix="rbfgate-refusal-cli-"))

    @_SETTINGS
    @given(case=pushed_out(bundles))
    def check(case):
        name, good, bad, feature, value = case
        bundle = bundles[name]
        source, out = workdir / "in.csv", workdir / "out.csv"
        with open(source, "w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(bundle.feature_names)
            for record in (good, bad):
                writer.writerow([repr(record[feature_name]) for feature_name in bundle.feature_names])
        assert main(["score", bundle.source, str(source), "--out", str(out), "--flag-outside"]) == 0
        with open(out, newline="") as handle:
            first, second = list(csv.DictReader(handle))
        assert (first["status"], first["problems"]) == ("scored", "")
        assert second["status"] == "refused"
        assert second["label"] == "" and second["nearest_distance"] == ""  # nothing was scored
        assert second["problems"].startswith(f"{feature.name}={value} outside [")
        assert ";" not in second["problems"]  # exactly one problem: the feature that was pushed out

    check()
