"""The ``rbfgate`` command line.

Each command module exposes ``register(subparsers)``, which adds its
sub-commands and sets ``handler`` on each: ``handler(args) -> int``. Commands
from other packages (the HTTP service's ``serve`` and ``token``) register
through the ``rbfgate.commands`` entry-point group, so this package never
imports them.

Exit codes: 0 ok, 1 a check refused (or a bug), 2 bad usage or bad input.
Errors are one line on stderr, never a traceback: an exception that is not
one of ours is a bug, reported as one line naming its class with a request
to report it (``RBFGATE_DEBUG=1`` adds the traceback). A reader that closes
the pipe early (``| head``) ends the command quietly with exit 0.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Mapping
from importlib.metadata import entry_points

from model_store.cli import bundle_commands, card_command, demo_command, score_command, store_commands
from model_store.errors import RbfgateError

__all__ = ["DEBUG_ENVIRON", "build_parser", "main"]

DEBUG_ENVIRON = "RBFGATE_DEBUG"  # "1": an unexpected error also prints its traceback

_LOCAL_MODULES = (demo_command, bundle_commands, score_command, card_command, store_commands)


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


def main(argv: list[str] | None = None, environ: Mapping[str, str] | None = None) -> int:
    """Run one command; ``environ`` (default ``os.environ``) is read for ``RBFGATE_DEBUG``."""
    environ = os.environ if environ is None else environ
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = int(args.handler(args) or 0)
        sys.stdout.flush()  # a reader that went away is noticed here, not at interpreter exit
        return code
    except BrokenPipeError:
        # The reader closed the pipe (`rbfgate history --json | head`): it asked for no more output.
        # Python flushes stdout again at exit; point it at /dev/null so that flush cannot fail
        # either (the Python documentation's note on SIGPIPE, in the signal module).
        _silence_stdout()
        return 0
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
    except Exception as exc:  # anything else is a bug in rbfgate: one line, and the traceback on request
        if environ.get(DEBUG_ENVIRON) == "1":
            traceback.print_exc(file=sys.stderr)
        print(_bug_line(args.command, exc), file=sys.stderr)
        return 1


def _bug_line(command: str, exc: Exception) -> str:
    detail = str(exc).splitlines()[0][:200] if str(exc) else ""
    return (
        f"rbfgate {command}: internal error {type(exc).__name__}{': ' + detail if detail else ''}; "
        f"this is a bug in rbfgate: please report it with the command you ran "
        f"(run it again with {DEBUG_ENVIRON}=1 for the traceback)"
    )


def _silence_stdout() -> None:
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):  # stdout without a file descriptor (captured by a test harness)
        pass


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
