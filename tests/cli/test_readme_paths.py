"""The README's user paths run as written: the quick start's demo and serve, then every block
marked ``<!-- runnable -->``, in README order, in one temporary directory, with the installed
``rbfgate`` and a real ``rbfgate serve`` (tests/cli/readme_session.py says how each command runs).

Only the quick start's environment set-up (``python3 -m venv``, ``pip install``) is left out: the
tests already run inside that environment. Blocks without the marker (docker, kubectl, other
stores) are only parsed, by tests/cli/test_readme_commands.py.
"""

from __future__ import annotations

import json
import subprocess
from dataclasses import dataclass
from pathlib import Path

import pytest

from readme_blocks import README, SHELL_LANGUAGES, Block, blocks, commands
from readme_session import CommandFailed, ReadmeSession, parse_curl

_TEXT = README.read_text(encoding="utf-8")
_BLOCKS = blocks(_TEXT)
_PATHS = ("Backend teams", "Data scientists", "Operators", "Auditors")


@dataclass
class _Run:
    failure: str | None  # None when every command ran
    answers: dict[int, object]  # README line of an answer block -> the real answer it shows
    left: list[str]  # what the paths left in the directory they ran in (top-level names, sorted)


def _quick_start_steps() -> list[str]:
    """The quick start's first command, split at ``&&``, without creating and filling .venv."""
    [first] = [block for block in _BLOCKS if block.section == "Quick start" and block.language == "sh"]
    steps = commands(first.text)[0].split(" && ")
    kept = [step for step in steps if not step.startswith("python3 -m venv") and " -m pip install " not in step]
    assert len(kept) == len(steps) - 2, f"the quick start's first command changed shape: {steps}"
    return kept


def _run_block(session: ReadmeSession, block: Block) -> None:
    if block.language in SHELL_LANGUAGES:
        for command in commands(block.text):
            session.run(command)
    elif block.language == "python":
        session.run_python(block.text, block.line)
    else:
        raise CommandFailed(f"a runnable block must be sh or python, not {block.language!r}")


@pytest.fixture(scope="module")
def readme_run(tmp_path_factory) -> _Run:
    session = ReadmeSession(tmp_path_factory.mktemp("reader"))
    answers: dict[int, object] = {}
    where = "the quick start"
    try:
        for step in _quick_start_steps():
            session.run(step)
        for block in _BLOCKS:
            where = f"README line {block.line}"
            if block.runnable:
                session.last_response = None
                _run_block(session, block)
            elif block.marker and block.marker.startswith("answer"):
                if session.last_response is None:
                    raise CommandFailed("an answer block with no request run just above it")
                answers[block.line] = session.last_response.json()
    except CommandFailed as failure:
        return _Run(f"{where}: {failure}", answers, _left(session.workdir))
    finally:
        session.close()
    return _Run(None, answers, _left(session.workdir))


def _left(workdir: Path) -> list[str]:
    return sorted(path.name + ("/" if path.is_dir() else "") for path in workdir.iterdir())


def test_every_runnable_block_of_the_readme_runs(readme_run):
    if readme_run.failure is not None:
        pytest.fail(readme_run.failure, pytrace=False)


@pytest.mark.parametrize("path", _PATHS)
def test_each_user_path_has_runnable_blocks(path):
    assert any(block.runnable and block.section.startswith(path) for block in _BLOCKS), path


def test_the_answer_the_readme_shows_is_the_real_answer(readme_run):
    shown = [block for block in _BLOCKS if block.marker and block.marker.startswith("answer")]
    assert shown, "the backend path shows an answer"
    for block in shown:
        if block.line not in readme_run.answers:
            pytest.fail(f"README line {block.line}: its request did not run ({readme_run.failure})", pytrace=False)
        written = json.loads(block.text, parse_float=_Shown, parse_int=_Shown)
        assert _differences(written, readme_run.answers[block.line]) == [], f"README line {block.line}"


def test_what_the_paths_leave_in_a_clone_is_ignored_by_git(readme_run):
    # The paths run "in the clone after the quick start": a reader who follows them must not be left
    # with untracked files in `git status`. `git check-ignore --no-index` applies the repository's
    # .gitignore to each name as if it were in the clone's root (git-check-ignore(1)).
    assert readme_run.left, "the paths wrote nothing: the directory listing is wrong"
    checked = subprocess.run(["git", "check-ignore", "--no-index", "--verbose", "--non-matching", *readme_run.left],
                             cwd=README.parent, capture_output=True, text=True, check=False)
    not_ignored = [line.split("\t", 1)[1] for line in checked.stdout.splitlines() if line.startswith("::")]
    assert not_ignored == [], f"add these to .gitignore, or have the README write them elsewhere: {not_ignored}"


class _Shown(str):
    """A number as the README writes it, so the comparison knows how many digits it shows."""

    @property
    def tolerance(self) -> float:
        digits = self.split(".")[1] if "." in self else ""
        return 0.5 * 10.0 ** -len(digits)


def _differences(shown, real, where: str = "answer") -> list[str]:
    """Where an answer written in the README differs from the real one: the same members and list
    lengths, equal strings (one ending in "..." stands for any string, as a digest that changes
    with every export), and numbers equal to the digits the README shows."""
    if isinstance(shown, _Shown):
        if isinstance(real, bool) or not isinstance(real, int | float):
            return [f"{where}: {shown} shown, {real!r} answered"]
        return [] if abs(float(shown) - real) <= shown.tolerance * (1 + 1e-9) else [f"{where}: {shown} shown, {real!r} answered"]
    if isinstance(shown, dict):
        if not isinstance(real, dict) or list(shown) != list(real):
            return [f"{where}: members {list(shown)} shown, {list(real) if isinstance(real, dict) else real!r} answered"]
        return [problem for key in shown for problem in _differences(shown[key], real[key], f"{where}.{key}")]
    if isinstance(shown, list):
        if not isinstance(real, list) or len(shown) != len(real):
            return [f"{where}: {len(shown)} items shown, {real!r} answered"]
        return [problem for index, (a, b) in enumerate(zip(shown, real)) for problem in _differences(a, b, f"{where}[{index}]")]
    if isinstance(shown, str) and shown.endswith("..."):
        return [] if isinstance(real, str) else [f"{where}: a string shown, {real!r} answered"]
    return [] if (shown == real and type(shown) is type(real)) else [f"{where}: {shown!r} shown, {real!r} answered"]


def test_a_curl_line_is_sent_as_curl_sends_it():
    # curl(1): -d sends a POST with Content-Type application/x-www-form-urlencoded unless -H sets one.
    request = parse_curl(["-s", "-X", "POST", "http://127.0.0.1:8000/models/m/activate", "-H", "Authorization: Bearer t",
                          "-d", '{"version": "1"}'])
    assert (request.method, request.body) == ("POST", '{"version": "1"}')
    assert request.headers == [("Authorization", "Bearer t"), ("Content-Type", "application/x-www-form-urlencoded")]


@pytest.mark.parametrize("words", [["-k", "http://127.0.0.1:8000/"], ["-d", "@body.json", "http://127.0.0.1:8000/"],
                                   ["http://127.0.0.1:8000/a", "http://127.0.0.1:8000/b"]])
def test_a_curl_line_the_session_cannot_send_faithfully_fails(words):
    with pytest.raises(CommandFailed):
        parse_curl(words)
