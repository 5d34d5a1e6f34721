"""The ``rbfgate`` command line.

Each command module exposes ``register(subparsers)``, which adds its
sub-commands and sets ``handler`` on each: ``handler(args) -> int``. Commands
from other packages (the HTTP service's ``serve`` and ``token``) register
through the ``rbfgate.commands`` entry-point group, so this package never
imports them.

Exit codes: 0 ok, 1 a check refused, 2 bad usage or bad input. Errors are
one line on stderr, never a traceback.
"""

from __future__ import annotations

import argparse
import sys
from importlib.metadata import entry_points

from model_store.cli import bundle_commands, demo_command, score_command, store_commands
from model_store.errors import RbfgateError

__all__ = ["build_parser", "main"]

_LOCAL_MODULES = (demo_command, bundle_commands, score_command, store_commands)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rbfgate",
        description="Package fitted RBF-kernel classifiers as pickle-free bundles, score, store and serve them.",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for module in _LOCAL_MODULES:
        module.register(subparsers)
    for entry in entry_points(group="rbfgate.commands"):
        entry.load()(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except RbfgateError as exc:
        print(f"rbfgate {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except OSError as exc:
        # A file system refusal we did not anticipate (a full disk, a path through a file):
        # still one line naming the path, never a traceback.
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"rbfgate {args.command}: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"rbfgate {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
