"""The store is "the store" or "the version store", never "model store" written as a name.

The package is called ``model_store`` (an identifier, kept); the words users read (README,
DEVELOPERS.md, docstrings, messages, CLI help, deployment files) must not turn it into a product name.
"""

from __future__ import annotations

import re
from pathlib import Path

from model_store.cli import build_parser

_ROOT = Path(__file__).resolve().parents[2]
_AS_A_NAME = re.compile(r"model[ \t-]+store", re.IGNORECASE)  # not model_store, the identifier


def _text_files():
    yield from (_ROOT / name for name in ("README.md", "DEVELOPERS.md", "pyproject.toml"))
    for folder in ("model_store", "service", "deploy", "tests", ".ci"):
        for path in sorted((_ROOT / folder).rglob("*")):
            if path.is_file() and path.suffix in {".py", ".md", ".yaml", ".yml", ".toml", ".conf", ".html", ""}:
                yield path


def test_no_document_or_source_calls_it_a_model_store():
    found = []
    for path in _text_files():
        if path == Path(__file__).resolve():
            continue  # this file names the phrase it looks for
        for number, line in enumerate(path.read_text(encoding="utf-8", errors="replace").splitlines(), start=1):
            if _AS_A_NAME.search(line):
                found.append(f"{path.relative_to(_ROOT)}:{number}: {line.strip()}")
    assert found == []


def test_cli_help_does_not_call_it_a_model_store():
    parser = build_parser()
    texts = [parser.format_help()]
    for action in parser._subparsers._group_actions:
        texts.extend(sub.format_help() for sub in action.choices.values())
    assert texts and not any(_AS_A_NAME.search(text) for text in texts)
