"""Every ``rbfgate`` command line the README shows is one the command line accepts.

Each shell block's ``rbfgate ...`` (also inside ``$( )``, after ``&&`` and after ``kubectl exec ...
--``) is parsed by the real parser, ``model_store.cli.build_parser`` with the commands that
register through entry points (``serve``, ``token``), with abbreviations turned off: an option
must be written in full, since argparse would otherwise accept ``--verif`` for ``--verify`` and a
later option starting the same way would break the README. The command tables' synopses are
checked the same way for the options they name. Blocks that need docker or kubectl are only
parsed here, never run; tests/cli/test_readme_paths.py runs the marked ones.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import re

import pytest

from model_store.cli import build_parser
from readme_blocks import README, SHELL_LANGUAGES, blocks, commands, rbfgate_argvs

_TEXT = README.read_text(encoding="utf-8")
_SYNOPSIS = re.compile(r"^\| `rbfgate ([^`]*)`", re.M)  # the first cell of a command-table row
_OPTION = re.compile(r"(?<![\w-])--[a-z][a-z0-9-]*")


def _strict(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    """``parser`` and every sub-parser below it with abbreviated options refused."""
    parser.allow_abbrev = False
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub in action.choices.values():
                _strict(sub)
    return parser


_PARSER = _strict(build_parser())


def parse_error(argv: list[str]) -> str | None:
    """What the real parser says about ``rbfgate ARGV``, or None when it accepts it."""
    said = io.StringIO()
    with contextlib.redirect_stderr(said), contextlib.redirect_stdout(io.StringIO()):
        try:
            _PARSER.parse_args(argv)
        except SystemExit as exit_:
            if exit_.code not in (0, None):  # 0: --help
                return said.getvalue().strip().splitlines()[-1]
    return None


def _shell_commands() -> list[tuple[int, list[str]]]:
    found = []
    for block in blocks(_TEXT):
        if block.language in SHELL_LANGUAGES:
            for command in commands(block.text):
                found.extend((block.line, argv) for argv in rbfgate_argvs(command))
    return found


def _subparser(words: list[str]) -> tuple[argparse.ArgumentParser, list[str]]:
    """The sub-parser that ``rbfgate WORDS...`` reaches, and the command words that led there."""
    parser, path = _PARSER, []
    for word in words:
        [choices] = [action.choices for action in parser._actions if isinstance(action, argparse._SubParsersAction)] or [None]
        if choices is None or word not in choices:
            break
        parser, path = choices[word], [*path, word]
    return parser, path


def test_every_rbfgate_command_line_in_the_readme_parses():
    problems = [f"README line {line}: rbfgate {' '.join(argv)}: {error}"
                for line, argv in _shell_commands() if (error := parse_error(argv)) is not None]
    assert problems == []


def test_the_readme_shell_blocks_hold_the_commands_of_every_path():
    shown = {tuple(argv[:2]) if argv[:1] in (["token"], ["trust"]) else argv[0] for _, argv in _shell_commands()}
    expected = {"demo", "serve", "export", "train", "inspect", "score", "publish", "versions", "preview",
                "activate", "rollback", "history", "verify", "card", "prune", "keygen", "sign",
                ("token", "add"), ("trust", "add"), ("trust", "list"), ("trust", "history")}
    assert expected <= shown, sorted(map(str, expected - shown))


@pytest.mark.parametrize("argv, fault", [
    (["histroy", "pallet-checks"], "a misspelt command"),
    (["history", "pallet-checks", "--verfy"], "a misspelt option"),
    (["history", "pallet-checks", "--ver"], "an abbreviated option"),
    (["activate", "pallet-checks", "1.1.0"], "a required option left out"),
    (["token", "add", "ops-alice", "--role", "admin"], "a value outside the choices"),
])
def test_the_check_refuses_a_readme_command_with(argv, fault):
    assert parse_error(argv) is not None, fault


def test_the_check_accepts_the_same_commands_written_correctly():
    for argv in (["history", "pallet-checks", "--verify"], ["activate", "pallet-checks", "1.1.0", "--reason", "r"],
                 ["token", "add", "ops-alice", "--role", "operate"]):
        assert parse_error(argv) is None, argv


def test_a_command_in_a_shell_block_is_found_wherever_the_shell_runs_it():
    line = ('export T=$(rbfgate token add a --role audit --quiet) && .venv/bin/rbfgate verify b.tar; '
            'kubectl -n rbfgate exec deploy/rbfgate -- rbfgate rollback m --reason "r"   # rbfgate in a comment')
    assert rbfgate_argvs(line) == [["token", "add", "a", "--role", "audit", "--quiet"], ["verify", "b.tar"],
                                   ["rollback", "m", "--reason", "r"]]


def test_commands_are_written_only_in_shell_blocks():
    elsewhere = [f"README line {block.line} ({block.language or 'no language'})"
                 for block in blocks(_TEXT) if block.language not in SHELL_LANGUAGES
                 for line in block.text.splitlines() if line.startswith(("rbfgate ", "$ rbfgate "))]
    assert elsewhere == []


def test_every_option_a_command_table_names_exists():
    problems, rows = [], _SYNOPSIS.findall(_TEXT)
    assert len(rows) >= 20, "the command tables of the README were not found"
    for synopsis in rows:
        parser, path = _subparser(synopsis.split())
        assert path, f"`rbfgate {synopsis}` names no command"
        known = {option for action in parser._actions for option in action.option_strings}
        problems.extend(f"rbfgate {' '.join(path)}: {option}" for option in _OPTION.findall(synopsis)
                        if option not in known)
    assert problems == []


def test_every_command_of_the_cli_is_in_the_readme():
    [commands_action] = [action for action in _PARSER._actions if isinstance(action, argparse._SubParsersAction)]
    written = {argv[0] for _, argv in _shell_commands() if argv} | {row.split()[0] for row in _SYNOPSIS.findall(_TEXT)}
    assert set(commands_action.choices) - written == set()
