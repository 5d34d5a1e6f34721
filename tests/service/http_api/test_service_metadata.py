"""Metadata, bundle download and history for auditors.

References: RFC 9530 section 3 (Repr-Digest: the SHA-256 of the representation, as a
base64 structured-field byte sequence), FIPS 180-4 via hashlib; the bundle loader
``model_store.load_bundle`` verifies every file's SHA-256 against the manifest.
"""

from __future__ import annotations

import base64
import hashlib

from model_store import load_bundle

from .cases import assert_problem, bearer


def test_downloaded_bundle_is_the_published_one(make_client, shared_store, tokens, service_models, tmp_path):
    path, issued = tokens
    client = make_client(shared_store.root, tokens_file=path)
    response = client.get("/models/iris/versions/1.0.0/bundle", headers=bearer(issued["audit"]))
    assert response.status_code == 200 and response.headers["content-type"] == "application/x-tar"
    expected = base64.b64encode(hashlib.sha256(response.content).digest()).decode()
    assert response.headers["Repr-Digest"] == f"sha-256=:{expected}:"
    archive = tmp_path / "iris-1.0.0.tar"
    archive.write_bytes(response.content)
    bundle = load_bundle(archive)  # checksums verified on load
    assert bundle.digest == response.headers["Rbfgate-Bundle-Sha256"] == service_models.iris1.bundle.digest
    bundle.self_test()


def test_version_metadata_names_what_an_auditor_needs_and_no_training_rows(shared_client, service_models):
    body = shared_client.get("/models/iris/versions/1.0.0").json()
    manifest = service_models.iris1.bundle.manifest
    assert (body["model"], body["version"], body["bundle_sha256"]) == ("iris", "1.0.0", service_models.iris1.bundle.digest)
    assert [feature["name"] for feature in body["features"]] == manifest.feature_names
    assert body["calibration"]["method"] == "sigmoid" and body["active"] is True
    assert body["classifier"]["support_vectors"] == sum(manifest.classifier.support_per_class)
    assert body["golden"]["vectors"] == len(manifest.golden.inputs)
    golden_row = repr(manifest.golden.inputs[0][0])
    assert "inputs" not in body["golden"] and golden_row not in str(body["golden"])


def test_model_listing_shows_versions_and_which_is_active(shared_client):
    body = shared_client.get("/models/iris").json()
    assert [(v["version"], v["active"]) for v in body["versions"]] == [("1.0.0", True), ("2.0.0", False)]
    listing = shared_client.get("/models").json()["models"]
    assert {(m["model"], m["active"]["version"]) for m in listing} == {("iris", "1.0.0"), ("cancer", "1.0.0")}


def test_history_comes_with_its_chain_verification(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    body = client.get("/models/iris/history", headers=bearer(issued["audit"])).json()
    assert body["verification"] == {"ok": True, "entries": len(body["entries"]), "problem": None}
    assert [entry["action"] for entry in body["entries"]][-1] == "activate"


def test_a_tampered_history_is_served_with_a_failed_verification(make_client, store, tokens):
    path, issued = tokens
    trail = store.root / "models" / "iris" / "history.jsonl"
    trail.chmod(0o644)
    trail.write_text(trail.read_text().replace("first release", "first relaese"))  # one edited reason
    body = make_client(store.root, tokens_file=path).get("/models/iris/history", headers=bearer(issued["audit"])).json()
    assert body["verification"]["ok"] is False and body["verification"]["problem"]
    assert any(entry.get("reason") == "first relaese" for entry in body["entries"])


def test_history_of_an_unknown_model_is_404(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    assert_problem(client.get("/models/nope/history", headers=bearer(issued["audit"])), 404)
