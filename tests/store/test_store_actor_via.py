"""Who acted and through what: ``actor`` with ``via`` (cli, http, python), and old trails that lack ``via``."""

from __future__ import annotations

import json

from store_support import iris_bundle, python_env, rehash, run_cli, trail_lines, two_releases, write_trail_lines

from model_store.store import Store
from model_store.store.history import GENESIS


def test_the_cli_records_via_cli_with_the_actor_given_or_the_os_user(tmp_path, bundle_factory):
    root = str(tmp_path / "store")
    env = python_env(USER="dana")
    assert run_cli("publish", str(iris_bundle(bundle_factory, "1.0.0")), "--store", root, env=env).returncode == 0
    assert run_cli("activate", "iris", "1.0.0", "--store", root, "--reason", "first", "--actor", "ops-dana",
                   env=env).returncode == 0
    entries = Store(root).history("iris")
    assert [(entry["actor"], entry["via"]) for entry in entries] == [("dana", "cli"), ("ops-dana", "cli")]


def test_the_python_api_records_via_python_unless_told(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="notebook")
    store.activate("iris", "1.0.0", reason="first", actor="ci-deployer", via="http")
    assert [entry["via"] for entry in store.history("iris")] == ["python", "http"]


def _strip_via(store, name: str) -> list[bytes]:
    """Rewrite the trail as rbfgate wrote it before ``via`` existed: the same entries without it, chained anew."""
    previous = GENESIS
    lines = []
    for line in trail_lines(store, name):
        entry = {key: value for key, value in json.loads(line).items() if key != "via"}
        entry = rehash({**entry, "prev_hash": previous})
        previous = entry["hash"]
        lines.append(json.dumps(entry, sort_keys=True).encode("utf-8"))
    write_trail_lines(store, name, lines)
    pointer_path = store.layout.pointer(name)
    pointer = json.loads(pointer_path.read_text())
    pointer["history_head"] = previous
    pointer_path.write_text(json.dumps(pointer))
    return lines


def test_a_trail_written_before_via_existed_still_verifies_and_is_extended_without_rewriting(tmp_path, bundle_factory):
    store = two_releases(tmp_path / "store", bundle_factory)
    old_lines = _strip_via(store, "iris")
    assert store.verify_history("iris") == 4
    store.rollback("iris", reason="after the upgrade", actor="bob", via="cli")
    lines = trail_lines(store, "iris")
    assert lines[:4] == old_lines  # old entries are never rewritten
    assert "via" not in json.loads(lines[0]) and json.loads(lines[-1])["via"] == "cli"
    assert store.verify_history("iris") == 5


def test_an_unknown_via_in_the_trail_is_reported_as_an_edit(tmp_path, bundle_factory):
    store = two_releases(tmp_path / "store", bundle_factory)
    lines = trail_lines(store, "iris")
    lines[-1] = json.dumps(rehash({**json.loads(lines[-1]), "via": "telepathy"}), sort_keys=True).encode()
    write_trail_lines(store, "iris", lines)
    result = run_cli("history", "iris", "--store", str(store.root), "--verify")
    assert result.returncode == 1 and "via 'telepathy' is not one of" in result.stderr


def test_cli_json_verification_uses_problem_for_a_failure(tmp_path, bundle_factory):
    store = two_releases(tmp_path / "store", bundle_factory)
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:-1])
    result = run_cli("history", "iris", "--store", str(store.root), "--verify", "--json")
    verification = json.loads(result.stdout)["verification"]
    assert result.returncode == 1
    assert set(verification) == {"ok", "entries", "problem"} and "truncated" in verification["problem"]


def test_an_outside_domain_choice_is_an_entry_with_via_and_refused_while_verification_fails(tmp_path, bundle_factory):
    store = two_releases(tmp_path / "store", bundle_factory)
    entry = store.set_outside_action("iris", "flag", reason="reviewed by the risk team", actor="dana", via="cli")
    assert (entry["action"], entry["actor"], entry["via"]) == ("outside-domain-flag", "dana", "cli")
    assert store.verify_history("iris") == 5
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:-1])  # cut off: the pointer names seq 5
    result = run_cli("outside-domain", "iris", "refuse", "--reason", "back", "--store", str(store.root))
    assert result.returncode == 1 and "truncated" in result.stderr
