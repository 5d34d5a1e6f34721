"""``rbfgate serve`` configured through its environment alone, as a container is.

Each option left off the command line falls back to its variable (service.settings.ENVIRON_KEYS),
then to its default; an option given wins. Exit codes are the CLI's contract (model_store.cli):
2 for bad input, with one line on stderr naming the variable.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from model_store.cli import build_parser, main
from model_store.store import Store
from service.commands import serve_settings
from service.settings import ENVIRON_KEYS, Settings


@pytest.fixture
def store(tmp_path) -> Store:
    return Store(tmp_path / "store", create=True)


@pytest.fixture(autouse=True)
def _no_inherited_settings(monkeypatch):
    for name in [*ENVIRON_KEYS.values(), "PROMETHEUS_MULTIPROC_DIR"]:
        monkeypatch.delenv(name, raising=False)


def container_environment(store: Store, tmp_path: Path) -> dict[str, str]:
    return {
        "RBFGATE_STORE": str(store.root),
        "RBFGATE_TOKENS": str(tmp_path / "tokens.json"),
        "RBFGATE_SERVE_HOST": "0.0.0.0",
        "RBFGATE_SERVE_PORT": "8080",
        "RBFGATE_SERVE_WORKERS": "3",
        "RBFGATE_SERVE_MAX_RECORDS": "50",
        "RBFGATE_SERVE_MAX_BODY_BYTES": "4096",
        "RBFGATE_SERVE_POLL_SECONDS": "0.5",
        "RBFGATE_SERVE_SAMPLE_SIZE": "7",
        "RBFGATE_SERVE_LOG_INPUTS": "1",
        "RBFGATE_SERVE_SCORING_THREADS": "3",
        "RBFGATE_SERVE_SCORING_QUEUE": "5",
        "RBFGATE_SERVE_PINNED_CACHE_BYTES": "1000000",
        "RBFGATE_SERVE_MAX_CONNECTIONS": "300",
    }


def parse(*argv: str):
    return build_parser().parse_args(["serve", *argv])


def test_every_setting_has_exactly_one_variable():
    assert set(ENVIRON_KEYS) == {field.name for field in dataclasses.fields(Settings)}
    assert len(set(ENVIRON_KEYS.values())) == len(ENVIRON_KEYS)


def test_the_settings_handed_to_workers_use_exactly_those_variables(tmp_path):
    settings = Settings(store_root=tmp_path, host="0.0.0.0", port=9000, workers=4, tokens_file=tmp_path / "t.json")
    assert set(settings.to_environ()) == set(ENVIRON_KEYS.values())
    assert Settings.from_environ(settings.to_environ()) == settings


def test_serve_takes_every_setting_from_the_environment(store, tmp_path):
    settings = serve_settings(parse(), container_environment(store, tmp_path))
    assert settings == Settings(
        store_root=store.root, tokens_file=tmp_path / "tokens.json", host="0.0.0.0", port=8080, workers=3,
        max_records=50, max_body_bytes=4096, poll_seconds=0.5, sample_size=7, log_inputs=True,
        scoring_threads=3, scoring_queue=5, pinned_cache_bytes=1_000_000, max_connections=300,
    )


def test_an_option_on_the_command_line_wins_over_its_variable(store, tmp_path):
    args = parse("--workers", "2", "--port", "8001", "--host", "127.0.0.1", "--poll-interval", "2")
    settings = serve_settings(args, container_environment(store, tmp_path))
    assert (settings.workers, settings.port, settings.host, settings.poll_seconds) == (2, 8001, "127.0.0.1", 2.0)
    assert settings.max_records == 50  # not given: still from the environment


def test_without_options_or_variables_serve_uses_the_documented_defaults(store):
    settings = serve_settings(parse(), {"RBFGATE_STORE": str(store.root)})
    assert (settings.host, settings.port, settings.workers, settings.poll_seconds) == ("127.0.0.1", 8000, 1, 1.0)
    assert settings.tokens_file is None and settings.log_inputs is False


@pytest.mark.parametrize(
    "name, value",
    [("RBFGATE_SERVE_WORKERS", "0"), ("RBFGATE_SERVE_WORKERS", "four"), ("RBFGATE_SERVE_PORT", "70000"),
     ("RBFGATE_SERVE_PORT", "http"), ("RBFGATE_SERVE_SCORING_THREADS", "0"), ("RBFGATE_SERVE_SCORING_QUEUE", "-1"),
     ("RBFGATE_SERVE_PINNED_CACHE_BYTES", "lots"), ("RBFGATE_SERVE_MAX_CONNECTIONS", "2")],
)
def test_a_bad_variable_stops_serve_with_one_line_naming_it(store, monkeypatch, capsys, name, value):
    monkeypatch.setenv("RBFGATE_STORE", str(store.root))
    monkeypatch.setenv(name, value)
    code = main(["serve"])
    err = capsys.readouterr().err
    assert code == 2 and name in err and len(err.strip().splitlines()) == 1
