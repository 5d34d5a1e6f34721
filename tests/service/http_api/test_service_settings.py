"""Settings travel to uvicorn workers through the environment and come back unchanged."""

from __future__ import annotations

from pathlib import Path

import pytest

from model_store.errors import InputError
from service.settings import Settings


def test_settings_survive_the_trip_through_the_environment(tmp_path):
    settings = Settings(
        store_root=tmp_path / "store",
        tokens_file=tmp_path / "tokens.json",
        max_records=17,
        max_body_bytes=4096,
        poll_seconds=0.25,
        sample_size=9,
        log_inputs=True,
    )
    assert Settings.from_environ(settings.to_environ()) == Settings(
        store_root=tmp_path / "store", tokens_file=tmp_path / "tokens.json", max_records=17,
        max_body_bytes=4096, poll_seconds=0.25, sample_size=9, log_inputs=True,
    )


def test_defaults_are_the_documented_limits(tmp_path):
    settings = Settings.from_environ({"RBFGATE_STORE": str(tmp_path)})
    assert (settings.max_records, settings.max_body_bytes, settings.poll_seconds) == (1000, 1024 * 1024, 1.0)
    assert settings.tokens_file is None and settings.log_inputs is False and settings.host == "127.0.0.1"


@pytest.mark.parametrize(
    "environ, phrase",
    [
        ({}, "RBFGATE_STORE"),
        ({"RBFGATE_STORE": "s", "RBFGATE_SERVE_MAX_RECORDS": "many"}, "RBFGATE_SERVE_MAX_RECORDS"),
        ({"RBFGATE_STORE": "s", "RBFGATE_SERVE_POLL_SECONDS": "soon"}, "RBFGATE_SERVE_POLL_SECONDS"),
        ({"RBFGATE_STORE": "s", "RBFGATE_SERVE_POLL_SECONDS": "nan"}, "--poll-interval"),
        ({"RBFGATE_STORE": "s", "RBFGATE_SERVE_MAX_RECORDS": "-1"}, "--max-records"),
    ],
)
def test_bad_environment_is_refused_naming_the_variable(environ, phrase):
    with pytest.raises(InputError, match=phrase):
        Settings.from_environ(environ)


def test_port_outside_tcp_range_is_refused():
    with pytest.raises(InputError, match="--port"):
        Settings(store_root=Path("s"), port=70000)  # TCP ports are 16-bit (RFC 9293 section 3.1)
