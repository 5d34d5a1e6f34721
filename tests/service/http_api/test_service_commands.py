"""``rbfgate token add|list|revoke`` and the checks ``rbfgate serve`` makes before it starts.

Exit codes are the CLI's contract (model_store.cli): 0 ok, 2 bad usage or input, with one
line on stderr. Token digests: SHA-256 (FIPS 180-4) via hashlib.
"""

from __future__ import annotations

import hashlib
import json
import socket

import pytest

from model_store.cli import build_parser, main


@pytest.fixture(autouse=True)
def _clean_environment(monkeypatch):
    for key in ("RBFGATE_TOKENS", "RBFGATE_STORE", "PROMETHEUS_MULTIPROC_DIR"):
        monkeypatch.delenv(key, raising=False)


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main([*map(str, argv)])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_serve_and_token_are_registered_through_the_entry_point():
    commands = build_parser()._subparsers._group_actions[0].choices
    assert {"serve", "token"} <= set(commands)


def test_token_add_prints_the_token_once_as_the_last_word(tmp_path, capsys):
    path = tmp_path / "tokens.json"
    code, out, _ = _run(capsys, "token", "add", "team-checkout", "--role", "score", "--tokens", path)
    token = out.split()[-1]
    assert code == 0 and len(token) >= 43  # 32 random bytes in urlsafe base64 (RFC 4648 section 5)
    [entry] = json.loads(path.read_text())["tokens"]
    assert entry == {**entry, "name": "team-checkout", "role": "score", "sha256": hashlib.sha256(token.encode()).hexdigest()}
    assert token not in path.read_text()
    assert path.stat().st_mode & 0o077 == 0  # readable by its owner only (common practice for secrets)


def test_token_add_quiet_prints_the_token_alone(tmp_path, capsys):
    path = tmp_path / "tokens.json"
    code, out, err = _run(capsys, "token", "add", "deploy-bot", "--role", "operate", "--tokens", path, "--quiet")
    token = out.removesuffix("\n")
    assert (code, err) == (0, "")
    assert out == token + "\n" and " " not in token  # one line, nothing but the token
    [entry] = json.loads(path.read_text())["tokens"]
    assert entry["sha256"] == hashlib.sha256(token.encode()).hexdigest()  # it is the token that was stored


def test_two_tokens_differ(tmp_path, capsys):
    path = tmp_path / "tokens.json"
    first = _run(capsys, "token", "add", "a", "--role", "score", "--tokens", path)[1].split()[-1]
    second = _run(capsys, "token", "add", "b", "--role", "score", "--tokens", path)[1].split()[-1]
    assert first != second


def test_token_list_shows_names_and_roles_never_tokens(tmp_path, capsys):
    path = tmp_path / "tokens.json"
    token = _run(capsys, "token", "add", "ops-alice", "--role", "operate", "--tokens", path)[1].split()[-1]
    code, out, _ = _run(capsys, "token", "list", "--tokens", path)
    assert code == 0 and "ops-alice" in out and "operate" in out and token not in out


def test_token_revoke_removes_only_that_token(tmp_path, capsys):
    path = tmp_path / "tokens.json"
    _run(capsys, "token", "add", "a", "--role", "score", "--tokens", path)
    _run(capsys, "token", "add", "b", "--role", "audit", "--tokens", path)
    assert _run(capsys, "token", "revoke", "a", "--tokens", path)[0] == 0
    assert [entry["name"] for entry in json.loads(path.read_text())["tokens"]] == ["b"]


@pytest.mark.parametrize(
    "argv, phrase",
    [
        (("token", "revoke", "nobody"), "no token named"),
        (("token", "add", "a", "--role", "score"), "exists"),
        (("token", "add", "../a", "--role", "score"), "not allowed"),
    ],
)
def test_token_mistakes_exit_2_with_one_line(tmp_path, capsys, argv, phrase):
    path = tmp_path / "tokens.json"
    _run(capsys, "token", "add", "a", "--role", "score", "--tokens", path)
    code, _, err = _run(capsys, *argv, "--tokens", path)
    assert code == 2 and phrase in err and len(err.strip().splitlines()) == 1


def test_token_commands_need_a_tokens_file(capsys):
    code, _, err = _run(capsys, "token", "list")
    assert code == 2 and "--tokens" in err


def test_serve_refuses_a_missing_tokens_file(shared_store, tmp_path, capsys):
    code, _, err = _run(capsys, "serve", "--store", shared_store.root, "--tokens", tmp_path / "absent.json")
    assert code == 2 and "absent.json" in err and len(err.strip().splitlines()) == 1


def test_serve_refuses_a_malformed_tokens_file(shared_store, tmp_path, capsys):
    path = tmp_path / "tokens.json"
    path.write_text('{"format": "rbfgate-tokens/1", "tokens": [{"name": "x"}]}')
    code, _, err = _run(capsys, "serve", "--store", shared_store.root, "--tokens", path)
    assert code == 2 and "tokens.json" in err and len(err.strip().splitlines()) == 1


def test_serve_refuses_a_missing_store(tmp_path, capsys):
    code, _, err = _run(capsys, "serve", "--store", tmp_path / "nowhere")
    assert code == 2 and "nowhere" in err


def test_serve_refuses_a_port_in_use(shared_store, capsys):
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        code, _, err = _run(capsys, "serve", "--store", shared_store.root, "--port", busy.getsockname()[1])
    assert code == 2 and "cannot listen" in err


@pytest.mark.parametrize(
    "option, value", [("--workers", "0"), ("--max-records", "0"), ("--max-body-bytes", "10"), ("--poll-interval", "0")]
)
def test_serve_refuses_nonsense_limits(shared_store, capsys, option, value):
    code, _, err = _run(capsys, "serve", "--store", shared_store.root, option, value)
    assert code == 2 and option in err
