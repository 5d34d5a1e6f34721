"""The command line never shows a traceback: bugs are one line, a closed pipe is no error.

Broken pipes: a process that writes to a pipe whose reader has gone gets EPIPE (POSIX write(2));
Python ignores SIGPIPE and raises BrokenPipeError instead, including when it flushes stdout at
exit (Python documentation, signal module, "Note on SIGPIPE"). The tests use real processes.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

from model_store.cli import main, store_commands
from model_store.store import Store

# A command whose handler has a bug: the real CLI, with one handler replaced inside the child process.
_BUGGY_VERSIONS = textwrap.dedent(
    """
    import sys
    from model_store.cli import main, store_commands

    def broken(args, environ):
        return {}["no such key"]

    store_commands._versions = broken
    sys.exit(main(sys.argv[1:]))
    """
)


def _environment(**extra: str) -> dict[str, str]:
    environment = {key: value for key, value in os.environ.items() if key != "RBFGATE_DEBUG"}
    return {**environment, **extra}


def _run_buggy(tmp_path, **extra: str) -> subprocess.CompletedProcess:
    Store(tmp_path / "store", create=True)
    command = [sys.executable, "-c", _BUGGY_VERSIONS, "versions", "iris", "--store", str(tmp_path / "store")]
    return subprocess.run(command, capture_output=True, text=True, env=_environment(**extra), timeout=60)


def test_an_unexpected_exception_is_one_line_naming_its_class_and_asking_for_a_report(tmp_path):
    result = _run_buggy(tmp_path)
    assert result.returncode == 1
    assert "Traceback" not in result.stderr
    [line] = result.stderr.splitlines()
    assert line.startswith("rbfgate versions: internal error KeyError: 'no such key'; this is a bug in rbfgate")
    assert "please report it" in line and "RBFGATE_DEBUG=1" in line


def test_rbfgate_debug_adds_the_traceback(tmp_path):
    result = _run_buggy(tmp_path, RBFGATE_DEBUG="1")
    assert result.returncode == 1
    assert result.stderr.startswith("Traceback (most recent call last):")
    assert "KeyError: 'no such key'" in result.stderr
    assert result.stderr.splitlines()[-1].startswith("rbfgate versions: internal error KeyError")


def test_the_debug_switch_is_read_from_the_environment_mapping_given(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(store_commands, "_versions", lambda args, environ: 1 / 0)
    Store(tmp_path / "store", create=True)
    argv = ["versions", "iris", "--store", str(tmp_path / "store")]
    assert main(argv, environ={}) == 1
    quiet = capsys.readouterr().err
    assert main(argv, environ={"RBFGATE_DEBUG": "1"}) == 1
    loud = capsys.readouterr().err
    assert "Traceback" not in quiet and quiet.count("\n") == 1 and "ZeroDivisionError" in quiet
    assert "Traceback (most recent call last)" in loud


@pytest.fixture
def store_with_history(tmp_path, iris_calibrated):
    bundle, _, _ = iris_calibrated
    store = Store(tmp_path / "store", create=True)
    store.publish(bundle.source, actor="alice")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    return store


def test_history_into_a_closed_pipe_exits_quietly(store_with_history):
    # The reader's end is closed before rbfgate writes: every write then fails with EPIPE.
    read_end, write_end = os.pipe()
    os.close(read_end)
    command = [sys.executable, "-m", "model_store", "history", "iris", "--json", "--store", str(store_with_history.root)]
    try:
        result = subprocess.run(command, stdout=write_end, stderr=subprocess.PIPE, text=True, env=_environment(),
                                timeout=60)
    finally:
        os.close(write_end)
    assert (result.returncode, result.stderr) == (0, "")


def test_history_piped_into_head_prints_no_error(store_with_history):
    # As a user would type it; head exits after one line while rbfgate may still be writing.
    rbfgate = f"{sys.executable} -m model_store history iris --json --store {store_with_history.root}"
    result = subprocess.run(["bash", "-o", "pipefail", "-c", f"{rbfgate} | head -n 1"], capture_output=True,
                            text=True, env=_environment(), timeout=60)
    assert result.stdout == "{\n"
    assert result.stderr == ""
    assert result.returncode == 0
