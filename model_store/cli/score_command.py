"""``rbfgate score``: score a CSV or Parquet table, here or on a Dask cluster.

    rbfgate score BUNDLE INPUT --out OUT [--keep COLUMN[,COLUMN]] [--engine local|dask] ...
    rbfgate score --store DIR --model NAME [--version V | --at TIME] INPUT --out OUT ...

The Dask engine is imported only when asked for, so the core command (and the
serving image, which has no Dask) never loads it.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Mapping
from pathlib import Path

from model_store.cli.store_commands import count_argument
from model_store.errors import InputError

__all__ = ["register"]

_DESCRIPTION = (
    "Score a table: a CSV or Parquet file, or a directory of part files (*.csv or *.parquet). The output is one "
    "CSV file, or a directory of Parquet parts when its name ends in .parquet. Rows the model cannot answer for are "
    "refused, never scored, and the output says why. With --store and --model the bundle comes from the store "
    "(the active version, --version, or the version live --at a time), and only INPUT is given."
)


def register(subparsers, environ: Mapping[str, str] | None = None) -> None:
    environ = os.environ if environ is None else environ
    parser = subparsers.add_parser("score", help="score a CSV or Parquet table; refuse rows the model cannot answer for",
                                   description=_DESCRIPTION)
    parser.add_argument("paths", nargs="+", metavar="[BUNDLE] INPUT",
                        help="bundle directory or .tar file (unless --model is given), then the input table")
    parser.add_argument("--out", type=Path, required=True, metavar="OUT", help="OUT.csv, or OUT.parquet (a directory)")
    parser.add_argument("--keep", metavar="COLUMN[,COLUMN]", default="",
                        help="input columns copied to the output, first (an id, say)")
    parser.add_argument("--engine", choices=("local", "dask"), default="local",
                        help="local: this process, streaming (default); dask: one task per input part on a Dask cluster")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="with --engine dask: the scheduler of an existing cluster (tcp://host:8786); "
                        "default: a local cluster started for this run")
    parser.add_argument("--workers", type=_positive, metavar="N",
                        help="with --engine dask and no --scheduler: worker processes (default: one per core)")
    parser.add_argument("--retries", type=count_argument, default=2, metavar="N",
                        help="with --engine dask: times a failed part is tried again (default 2)")
    parser.add_argument("--store", metavar="DIR", help="store directory (default: $RBFGATE_STORE, else "
                        "$XDG_DATA_HOME/rbfgate/store, else ~/.local/share/rbfgate/store)")
    parser.add_argument("--model", metavar="NAME", help="score with a version of this model from the store")
    which = parser.add_mutually_exclusive_group()
    which.add_argument("--version", metavar="V", help="with --model: this version (default: the active one)")
    which.add_argument("--at", metavar="TIME", help="with --model: the version live at this RFC 3339 time, "
                       "e.g. 2026-12-01T21:40:00Z (from the model's verified history)")
    parser.add_argument("--flag-outside", action="store_true",
                        help="answer rows whose domain verdict is outside (flagged in domain_verdict) instead of "
                        "refusing them as outside_domain (with --model: default the store's choice for the model)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar (it shows only on a terminal)")
    parser.set_defaults(handler=lambda args: _score(args, environ))


def _positive(text: str) -> int:
    value = count_argument(text)
    if value == 0:
        raise argparse.ArgumentTypeError("give 1 or more")
    return value


def _score(args, environ) -> int:
    from model_store.batch_scoring import score_file

    source, model = _model_and_input(args, environ)
    keep = [name.strip() for name in args.keep.split(",")] if args.keep else []
    progress = False if args.no_progress else None
    outside_action = "flag" if args.flag_outside else model.outside_action
    if args.engine == "local":
        for flag in ("scheduler", "workers"):
            if getattr(args, flag) is not None:
                raise InputError(f"--{flag} applies to --engine dask only")
        summary = score_file(model.bundle, source, args.out, keep=keep, origin=model.origin, progress=progress,
                             outside_action=outside_action)
    else:
        if args.scheduler is not None and args.workers is not None:
            raise InputError("--workers sizes the local cluster; an existing cluster (--scheduler) has its own workers")
        from model_store.dask_engine import DaskRun, score_with_dask

        summary = score_with_dask(
            model.bundle, source, args.out, keep=keep, origin=model.origin, progress=progress,
            run=DaskRun(scheduler=args.scheduler, workers=args.workers, retries=args.retries),
            outside_action=outside_action,
        )
    print(f"{summary.scored} scored, {summary.refused} refused", file=sys.stderr)
    return 0


def _model_and_input(args, environ):
    from model_store.scoring_source import from_bundle_path, from_store

    if args.model is None:
        if args.store is not None:
            raise InputError("--store picks the store to take a model from; give --model NAME too")
        if args.version is not None or args.at is not None:
            raise InputError("--version and --at choose a version from the store; give --model NAME too")
        if len(args.paths) != 2:
            raise InputError("give BUNDLE and INPUT (or --model NAME and INPUT to score with a version from the store)")
        return Path(args.paths[1]), from_bundle_path(Path(args.paths[0]))
    if len(args.paths) != 1:
        raise InputError("with --model the bundle comes from the store; give only INPUT")
    from model_store.store import Store, resolve_store_root

    store = Store(resolve_store_root(args.store, environ))
    return Path(args.paths[0]), from_store(store, args.model, version=args.version, at=args.at)
