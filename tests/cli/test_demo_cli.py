"""``rbfgate demo``: the quick-start scenario runs end to end and leaves a store ready to serve."""

from __future__ import annotations

import csv

import numpy as np

from model_store.cli import main
from model_store.demo import CLASSES, FEATURES, generate
from model_store.store import Store


def test_demo_generator_is_deterministic_for_a_seed():
    first, labels = generate(200, seed=11)
    second, again = generate(200, seed=11)
    np.testing.assert_array_equal(first, second)
    assert labels == again
    other, _ = generate(200, seed=12)
    assert not np.array_equal(first, other)


def test_demo_generator_produces_every_class():
    _, labels = generate(1200, seed=7)
    assert set(labels) == set(CLASSES)


def test_demo_trains_scores_publishes_and_activates(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--rows", "400"]) == 0
    with open(out / "incoming_scored.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert [row["status"] for row in rows].count("refused") == 4  # the four planted bad pallets
    assert list(rows[0])[0] == "pallet_id" and rows[0]["pallet_id"]  # the ids travel with the results
    assert rows[-2]["problems"].startswith("core_temp_c=19.0 outside")
    # Every reading of the last one is in range, but its surface is 5 degC colder than its core.
    assert rows[-1]["domain_verdict"] == "outside" and "outside the model's domain" in rows[-1]["problems"]
    store = Store(out / "store")
    active = store.active("pallet-checks")
    assert active is not None and active.version == "1.0.0"
    bundle = store.load_verified("pallet-checks", "1.0.0")
    assert bundle.feature_names == list(FEATURES)
    assert store.verify_history("pallet-checks") == 2
    printed = capsys.readouterr().out
    assert "rbfgate serve --store" in printed and "curl" in printed
    assert "http://127.0.0.1:8000/view/" in printed  # where serve's pages are (its default address)


def test_demo_rerun_replaces_its_own_folder(tmp_path):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--rows", "300"]) == 0
    assert main(["demo", "--out", str(out), "--rows", "300"]) == 0
    assert Store(out / "store").verify_history("pallet-checks") == 2


def test_demo_refuses_a_folder_it_did_not_create(tmp_path, capsys):
    (tmp_path / "mine.txt").write_text("keep me")
    assert main(["demo", "--out", str(tmp_path)]) == 2
    assert "not an earlier demo folder" in capsys.readouterr().err
    assert (tmp_path / "mine.txt").read_text() == "keep me"
