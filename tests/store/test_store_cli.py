"""The store commands end to end: pinned names and flags, exit codes (0 ok, 1 refused, 2 bad input), one-line errors."""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import subprocess
from pathlib import Path

import pytest
from store_support import FEATURES, flip_byte, iris_bundle, iris_model, python_env, run_cli

from model_store.cli import main, store_commands
from model_store.errors import StoreError
from model_store.store import Store, default_store_root, resolve_store_root


def rbfgate(capsys, *args: str) -> tuple[int, str, str]:
    code = main([str(arg) for arg in args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture
def bundles(bundle_factory) -> dict[str, Path]:
    return {version: iris_bundle(bundle_factory, version, C=C) for version, C in (("1.0.0", 1.0), ("1.1.0", 0.05))}


@pytest.fixture
def store_dir(tmp_path, bundles, capsys) -> Path:
    root = tmp_path / "store"
    for path in bundles.values():
        assert rbfgate(capsys, "publish", path, "--store", root, "--actor", "publisher")[0] == 0
    return root


def test_an_operator_workflow_runs_with_the_cli_alone(tmp_path, bundles):
    env = python_env(RBFGATE_STORE=str(tmp_path / "env-store"), USER="dana")
    for path in bundles.values():
        assert run_cli("publish", str(path), env=env).returncode == 0
    assert run_cli("activate", "iris", "1.0.0", "--reason", "first release", env=env).returncode == 0
    assert run_cli("activate", "iris", "1.1.0", "--reason", "smaller model", env=env).returncode == 0
    rollback = run_cli("rollback", "iris", "--reason", "flips too many labels", env=env)
    assert rollback.returncode == 0 and "1.0.0" in rollback.stdout

    versions = run_cli("versions", "iris", env=env)
    table = [line.split() for line in versions.stdout.splitlines()]
    assert table[0] == ["VERSION", "DIGEST", "CREATED", "PUBLISHED", "ACTIVE"]
    assert [row[0] for row in table[1:]] == ["1.0.0", "1.1.0"]
    assert table[1][-1] == "active" and len(table[2]) == 4  # 1.1.0 has no ACTIVE mark

    history = run_cli("history", "iris", "--verify", "--json", env=env)
    document = json.loads(history.stdout)
    assert history.returncode == 0 and document["verification"]["ok"]
    assert [entry["action"] for entry in document["entries"]] == ["publish", "publish", "activate", "activate", "rollback"]
    assert {entry["actor"] for entry in document["entries"]} == {"dana"}  # the OS user by default
    assert document["entries"][-1]["reason"] == "flips too many labels"


def test_history_text_prints_every_entry_with_its_reason(capsys, store_dir):
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first release", "--actor", "ann")
    code, out, _ = rbfgate(capsys, "history", "iris", "--store", store_dir, "--verify")
    lines = out.splitlines()
    assert code == 0 and len(lines) == 4
    assert "activate" in lines[2] and "reason: first release" in lines[2] and "by ann" in lines[2]
    assert lines[-1].startswith("verified: 3 entries")


def test_history_verify_of_a_tampered_trail_exits_1_naming_the_entry(capsys, store_dir):
    trail = store_dir / "models" / "iris" / "history.jsonl"
    lines = trail.read_bytes().splitlines()
    trail.write_bytes(lines[1] + b"\n" + lines[0] + b"\n")
    code, _, err = rbfgate(capsys, "history", "iris", "--store", store_dir, "--verify")
    assert code == 1 and "out of order" in err and "Traceback" not in err


def test_publishing_the_same_bundle_again_exits_0(capsys, store_dir, bundles):
    code, out, _ = rbfgate(capsys, "publish", bundles["1.0.0"], "--store", store_dir)
    assert code == 0 and "already published" in out


def test_publishing_other_content_under_a_published_version_exits_1(capsys, store_dir, bundle_factory):
    conflicting = iris_bundle(bundle_factory, "1.0.0", C=3.0)
    code, _, err = rbfgate(capsys, "publish", conflicting, "--store", store_dir)
    assert code == 1 and "already published" in err and len(err.strip().splitlines()) == 1


def test_activating_a_corrupted_version_exits_1_and_keeps_the_active_one(capsys, store_dir):
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first")
    flip_byte(store_dir / "models" / "iris" / "versions" / "1.1.0" / "bundle" / "support_vectors.npy")
    code, _, err = rbfgate(capsys, "activate", "iris", "1.1.0", "--store", store_dir, "--reason", "upgrade")
    assert code == 1 and "support_vectors.npy" in err
    assert Store(store_dir).active("iris").version == "1.0.0"


@pytest.mark.parametrize(
    "bad_name",
    ["a/b", "..", "a\x00b", ".hidden", "x" * 65],
    ids=["slash", "dot-dot", "nul", "leading-dot", "over-long"],
)
@pytest.mark.parametrize("command", ["versions", "activate-name", "activate-version", "history", "prune"])
def test_unsafe_names_exit_2_with_a_clear_message(capsys, store_dir, bad_name, command):
    args = {
        "versions": ["versions", bad_name],
        "activate-name": ["activate", bad_name, "1.0.0", "--reason", "x"],
        "activate-version": ["activate", "iris", bad_name, "--reason", "x"],
        "history": ["history", bad_name],
        "prune": ["prune", bad_name, "--keep", "1"],
    }[command]
    code, _, err = rbfgate(capsys, *args, "--store", store_dir)
    assert code == 2
    assert ("not allowed" in err) or ("limit is 64" in err)
    assert len(err.strip().splitlines()) == 1
    assert os.listdir(store_dir / "models") == ["iris"]  # nothing was created from the bad name


def test_a_missing_store_exits_2_with_one_line(capsys, tmp_path):
    code, _, err = rbfgate(capsys, "versions", "iris", "--store", tmp_path / "nowhere")
    assert code == 2 and "does not exist" in err and len(err.strip().splitlines()) == 1


def test_a_directory_with_foreign_files_exits_2(capsys, tmp_path, bundles):
    foreign = tmp_path / "photos"
    foreign.mkdir()
    (foreign / "holiday.jpg").write_bytes(b"\xff\xd8")
    code, _, err = rbfgate(capsys, "publish", bundles["1.0.0"], "--store", foreign)
    assert code == 2 and "not an rbfgate store" in err
    assert os.listdir(foreign) == ["holiday.jpg"]  # nothing written next to foreign files


@contextlib.contextmanager
def _read_only(root: Path):
    """Make a store read-only: chattr +i as root (root ignores permission bits), chmod otherwise."""
    paths = [root, root / "lock", *sorted(root.rglob("*"))]
    if os.geteuid() == 0:
        result = subprocess.run(["chattr", "+i", *map(str, paths)], capture_output=True)
        if result.returncode != 0:
            pytest.skip(f"cannot make files immutable here: {result.stderr.decode().strip()}")
        try:
            yield
        finally:
            subprocess.run(["chattr", "-i", *map(str, paths)], check=True)
    else:
        modes = {path: path.stat().st_mode for path in paths}
        for path in reversed(paths):
            path.chmod(modes[path] & ~0o222)
        try:
            yield
        finally:
            for path in paths:
                path.chmod(modes[path])


def test_a_read_only_store_can_be_read_but_changes_exit_2(capsys, store_dir):
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first")
    with _read_only(store_dir):
        assert rbfgate(capsys, "versions", "iris", "--store", store_dir)[0] == 0
        assert rbfgate(capsys, "history", "iris", "--store", store_dir, "--verify")[0] == 0
        Store(store_dir).load_verified("iris", "1.0.0")
        code, _, err = rbfgate(capsys, "activate", "iris", "1.1.0", "--store", store_dir, "--reason", "upgrade")
    assert code == 2 and "read-only" in err and len(err.strip().splitlines()) == 1
    assert Store(store_dir).active("iris").version == "1.0.0"


def test_activate_without_a_reason_is_bad_usage(capsys, store_dir):
    with pytest.raises(SystemExit) as caught:
        main(["activate", "iris", "1.0.0", "--store", str(store_dir)])
    assert caught.value.code == 2
    assert "--reason" in capsys.readouterr().err


def test_a_blank_reason_exits_2_with_one_clear_line(capsys, store_dir):
    code, _, err = rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "   ")
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert err.startswith("rbfgate activate: error: reason must not be empty")


def test_prune_prints_what_it_removed(capsys, store_dir):
    rbfgate(capsys, "activate", "iris", "1.1.0", "--store", store_dir, "--reason", "smaller")
    code, out, _ = rbfgate(capsys, "prune", "iris", "--store", store_dir, "--keep", "0")
    assert code == 0 and out.strip() == "removed from iris: 1.0.0"


def test_preview_prints_flips_and_refusals_of_a_csv(capsys, store_dir, tmp_path):
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first")
    _, X, _ = iris_model()
    inputs = tmp_path / "recent.csv"
    inputs.write_text(
        ",".join(FEATURES) + "\n" + ",".join(map(str, X[0])) + "\n" + "abc," + ",".join(map(str, X[0][1:])) + "\n"
    )
    code, out, _ = rbfgate(capsys, "preview", "iris", "1.1.0", "--store", store_dir, "--inputs", inputs)
    assert code == 0
    assert "labels that would flip:" in out and "active \\ candidate" in out
    assert "refused by both: 1" in out and out.strip().endswith("nothing was changed in the store")


def test_preview_of_a_malformed_csv_exits_2_naming_the_row(capsys, store_dir, tmp_path):
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first")
    inputs = tmp_path / "recent.csv"
    inputs.write_text(",".join(FEATURES) + "\n1,2,3,4,5\n")
    code, _, err = rbfgate(capsys, "preview", "iris", "1.1.0", "--store", store_dir, "--inputs", inputs)
    assert code == 2 and "row 1" in err


def test_preview_reads_a_csv_as_score_does_ignoring_extra_columns(capsys, store_dir, tmp_path):
    """An id column is ignored and a short row is refused as missing, exactly like `rbfgate score`."""
    rbfgate(capsys, "activate", "iris", "1.0.0", "--store", store_dir, "--reason", "first")
    inputs = tmp_path / "recent.csv"
    inputs.write_text("id," + ",".join(FEATURES) + "\nA,5.1,3.5,1.4,0.2\nB,5.1,3.5\n")
    code, out, _ = rbfgate(capsys, "preview", "iris", "1.1.0", "--store", store_dir, "--inputs", inputs)
    assert code == 0
    assert "refused by both: 1" in out


def test_keygen_sign_trust_and_a_signed_store_end_to_end(capsys, tmp_path, bundles):
    root = tmp_path / "signed-store"
    assert rbfgate(capsys, "keygen", "--out", tmp_path / "ops")[0] == 0
    code, out, _ = rbfgate(capsys, "trust", "add", tmp_path / "ops.pub", "--store", root, "--label", "ops")
    assert code == 0 and "requires signed bundles" in out
    code, _, err = rbfgate(capsys, "publish", bundles["1.0.0"], "--store", root)
    assert code == 1 and "unsigned" in err
    assert rbfgate(capsys, "sign", bundles["1.0.0"], "--key", tmp_path / "ops.key")[0] == 0
    assert rbfgate(capsys, "publish", bundles["1.0.0"], "--store", root)[0] == 0
    assert rbfgate(capsys, "activate", "iris", "1.0.0", "--store", root, "--reason", "signed")[0] == 0
    code, out, _ = rbfgate(capsys, "trust", "list", "--store", root)
    assert code == 0 and out.split()[0] == Store(root).trusted_keys()[0].key_id


def test_sign_with_a_missing_key_exits_2(capsys, tmp_path, bundles):
    code, _, err = rbfgate(capsys, "sign", bundles["1.0.0"], "--key", tmp_path / "absent.key")
    assert code == 2 and "no such private key" in err


def test_store_location_prefers_the_flag_then_the_environment_then_the_default():
    environ = {"RBFGATE_STORE": "/srv/from-env", "HOME": "/home/dana"}
    assert resolve_store_root("/srv/from-flag", environ) == Path("/srv/from-flag")
    assert resolve_store_root(None, environ) == Path("/srv/from-env")
    assert resolve_store_root(None, {"HOME": "/home/dana"}) == Path("/home/dana/.local/share/rbfgate/store")
    assert default_store_root({"XDG_DATA_HOME": "/data", "HOME": "/home/dana"}) == Path("/data/rbfgate/store")
    with pytest.raises(StoreError, match="--store"):
        resolve_store_root(None, {})


def test_the_commands_read_store_and_actor_from_the_environment_they_are_given(tmp_path, bundles, capsys):
    parser = argparse.ArgumentParser(prog="rbfgate")
    store_commands.register(parser.add_subparsers(dest="command"), {"RBFGATE_STORE": str(tmp_path / "s"), "USER": "eve"})
    for argv in (["publish", str(bundles["1.0.0"])], ["activate", "iris", "1.0.0", "--reason", "from a dict"]):
        args = parser.parse_args(argv)
        assert args.handler(args) == 0
    assert [entry["actor"] for entry in Store(tmp_path / "s").history("iris")] == ["eve", "eve"]


def test_publishing_a_missing_bundle_creates_no_store(capsys, tmp_path):
    code, _, err = rbfgate(capsys, "publish", tmp_path / "typo", "--store", tmp_path / "new-store")
    assert code == 2 and "no such bundle" in err
    assert not (tmp_path / "new-store").exists()
