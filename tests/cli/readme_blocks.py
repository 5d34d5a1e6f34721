"""The README read the way its tests need it: fenced code blocks, their shell commands, and the
``rbfgate`` command lines inside those commands.

A block is marked for running by an HTML comment on the last non-blank line above its opening
fence: ``<!-- runnable -->`` (tests/cli/test_readme_paths.py runs it); a comment starting with
``<!-- answer`` marks a JSON block that shows the answer to the request just above it.
Shell words are split as POSIX sh splits them (Python's ``shlex``, punctuation as separate tokens),
which is what a reader's shell does with the line.
"""

from __future__ import annotations

import re
import shlex
from dataclasses import dataclass
from pathlib import Path

__all__ = ["README", "SHELL_LANGUAGES", "Block", "blocks", "commands", "rbfgate_argvs", "sections", "words"]

README = Path(__file__).resolve().parents[2] / "README.md"
SHELL_LANGUAGES = frozenset({"sh", "bash", "shell"})

_FENCE = re.compile(r"^```(\S*)\s*$")
_MARKER = re.compile(r"^<!--\s*(.*?)\s*-->$")
_ASSIGNMENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*=")
# Tokens that end one simple command and may start another: lists, pipes, background jobs,
# subshells and command substitutions ("$(" splits into "$" glued to the word before, then "(").
_SEPARATORS = frozenset({"&&", "||", ";", "|", "&", "(", ")", ";;"})


@dataclass(frozen=True)
class Block:
    """One fenced code block: its info-string language, its text, where it starts, its marker."""

    language: str
    text: str
    line: int  # 1-based line number of the opening fence in the README
    marker: str | None  # the HTML comment above it, without "<!--" and "-->"
    section: str  # the nearest "## " heading above it

    @property
    def runnable(self) -> bool:
        return self.marker == "runnable"


def blocks(text: str) -> list[Block]:
    """Every fenced block of a Markdown text, in order."""
    found: list[Block] = []
    lines = text.splitlines()
    section = ""
    index = 0
    while index < len(lines):
        line = lines[index]
        opening = _FENCE.match(line)
        if opening is None:
            if line.startswith("## "):
                section = line[3:]
            index += 1
            continue
        body_start = index + 1
        index = body_start
        while index < len(lines) and lines[index].rstrip() != "```":
            index += 1
        if index == len(lines):
            raise ValueError(f"README line {body_start}: a code block that is never closed")
        found.append(Block(opening.group(1), "\n".join(lines[body_start:index]) + "\n", body_start,
                           _marker_above(lines, body_start - 1), section))
        index += 1
    return found


def sections(text: str) -> list[str]:
    """The "## " headings outside code blocks, in order."""
    headings, inside = [], False
    for line in text.splitlines():
        if _FENCE.match(line):  # an opening fence, or the bare one that closes a block
            inside = not inside
        elif not inside and line.startswith("## "):
            headings.append(line[3:])
    return headings


def commands(script: str) -> list[str]:
    """The logical command lines of a shell block: a line ending in a backslash and a quote left
    open both continue on the next line; blank lines and comment lines are dropped."""
    found, pending = [], ""
    for line in script.splitlines():
        pending = f"{pending}\n{line}" if pending else line
        if pending.endswith("\\"):
            continue
        try:
            shlex.split(pending, comments=True)
        except ValueError:  # "No closing quotation": the quoted text goes on
            continue
        if pending.strip() and not pending.lstrip().startswith("#"):
            found.append(pending)
        pending = ""
    if pending.strip():
        raise ValueError(f"a command that never ends: {pending!r}")
    return found


def rbfgate_argvs(command: str) -> list[list[str]]:
    """The arguments of every ``rbfgate`` run by one command line, as the shell passes them.

    ``rbfgate`` counts where the shell would run it: first in a simple command (after ``VAR=value``
    assignments), after a list or pipe separator, inside ``$( )``, and after a ``--`` that hands the
    rest of a line to another program (``kubectl exec POD -- rbfgate ...``). ``.venv/bin/rbfgate``
    counts too. Variables and substitutions are left as written (``$AUDIT_TOKEN``).
    """
    argvs: list[list[str]] = []
    current: list[str] | None = None
    at_command = True
    for token in words(command):
        if token in _SEPARATORS:
            current, at_command = None, True
        elif current is not None:
            current.append(token)
        elif token == "--":
            at_command = True
        elif at_command and _ASSIGNMENT.match(token):
            continue
        elif at_command:
            if token == "rbfgate" or token.endswith("/rbfgate"):
                current = []
                argvs.append(current)
            at_command = False
    return argvs


def words(command: str) -> list[str]:
    """A command line's shell words, with list, pipe and subshell punctuation as words of their own."""
    lexer = shlex.shlex(command.replace("\\\n", " "), posix=True, punctuation_chars=True)
    lexer.whitespace_split = True
    return list(lexer)


def _marker_above(lines: list[str], fence_index: int) -> str | None:
    index = fence_index - 1
    while index >= 0 and not lines[index].strip():
        index -= 1
    if index < 0:
        return None
    match = _MARKER.match(lines[index].strip())
    return match.group(1) if match else None
