"""``rbfgate serve`` and ``rbfgate token add|list|revoke``.

Registered through the ``rbfgate.commands`` entry point, so ``model_store``
never imports the service. This module is imported by every ``rbfgate``
command, so it imports nothing heavy at the top: FastAPI, uvicorn and
prometheus-client are imported only when ``serve`` runs, after the
environment for the workers is ready (prometheus-client picks its
multiprocess mode when it is first imported).
"""

from __future__ import annotations

import argparse
import os
import shutil
import socket
import sys
import tempfile
from collections.abc import MutableMapping
from pathlib import Path

from model_store.errors import InputError
from service.settings import (
    DEFAULT_HOST,
    DEFAULT_MAX_BODY_BYTES,
    DEFAULT_MAX_RECORDS,
    DEFAULT_POLL_SECONDS,
    DEFAULT_PORT,
    DEFAULT_SAMPLE_SIZE,
    Settings,
)
from service.tokens import ROLES, add_token, read_tokens, revoke_token

__all__ = ["register"]

_TOKENS_ENVIRON = "RBFGATE_TOKENS"
_MULTIPROCESS_ENVIRON = "PROMETHEUS_MULTIPROC_DIR"


def register(subparsers) -> None:
    """Add ``serve`` and ``token`` to the ``rbfgate`` parser."""
    serve = subparsers.add_parser(
        "serve",
        help="run the HTTP scoring service on a store",
        description="Serve the active version of every model in the store over HTTP, following version switches.",
    )
    serve.add_argument("--store", metavar="DIR", help="the store (default: $RBFGATE_STORE, else the per-user store)")
    serve.add_argument("--host", default=DEFAULT_HOST, help=f"address to listen on (default {DEFAULT_HOST})")
    serve.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"TCP port (default {DEFAULT_PORT})")
    serve.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    serve.add_argument("--tokens", metavar="FILE", help=f"tokens file (default ${_TOKENS_ENVIRON}); without one, "
                       "scoring and metadata are open and history, bundles and version changes are refused")
    serve.add_argument("--max-records", type=int, default=DEFAULT_MAX_RECORDS,
                       help=f"most records per scoring request (default {DEFAULT_MAX_RECORDS})")
    serve.add_argument("--max-body-bytes", type=int, default=DEFAULT_MAX_BODY_BYTES,
                       help=f"largest request body in bytes (default {DEFAULT_MAX_BODY_BYTES})")
    serve.add_argument("--poll-interval", type=float, default=DEFAULT_POLL_SECONDS, metavar="SECONDS",
                       help=f"seconds between reads of the active versions (default {DEFAULT_POLL_SECONDS:g})")
    serve.add_argument("--preview-sample", type=int, default=DEFAULT_SAMPLE_SIZE, metavar="N",
                       help=f"recent records kept per model for the swap preview (default {DEFAULT_SAMPLE_SIZE})")
    serve.add_argument("--log-inputs", action="store_true", help="write feature values into the request log")
    serve.set_defaults(handler=_serve)

    token = subparsers.add_parser("token", help="manage the service's tokens",
                                  description="Create, list and revoke the bearer tokens of `rbfgate serve`.")
    actions = token.add_subparsers(dest="token_action", metavar="ACTION", required=True)
    add = actions.add_parser("add", help="create a token (printed once, stored only as its SHA-256)")
    add.add_argument("name", help="who holds the token; recorded as the actor in the history")
    add.add_argument("--role", required=True, choices=ROLES, help="score, operate or audit")
    listing = actions.add_parser("list", help="list token names and roles (never the tokens)")
    revoke = actions.add_parser("revoke", help="remove a token; a running service refuses it within a poll interval")
    revoke.add_argument("name")
    for parser in (add, listing, revoke):
        parser.add_argument("--tokens", metavar="FILE", help=f"the tokens file (default ${_TOKENS_ENVIRON})")
    add.set_defaults(handler=_token_add)
    listing.set_defaults(handler=_token_list)
    revoke.set_defaults(handler=_token_revoke)


def _serve(args: argparse.Namespace, environ: MutableMapping[str, str] = os.environ) -> int:
    from model_store.store import Store, resolve_store_root

    root = resolve_store_root(args.store, environ)
    Store(root)  # a missing or foreign store stops here with the store's own message
    tokens = args.tokens or environ.get(_TOKENS_ENVIRON) or None
    settings = Settings(
        store_root=root,
        tokens_file=Path(tokens) if tokens else None,
        host=args.host,
        port=args.port,
        workers=args.workers,
        max_records=args.max_records,
        max_body_bytes=args.max_body_bytes,
        poll_seconds=args.poll_interval,
        sample_size=args.preview_sample,
        log_inputs=args.log_inputs,
    )
    if settings.tokens_file is not None:
        read_tokens(settings.tokens_file)  # unreadable or malformed: refuse to start
    _check_port_free(settings.host, settings.port)
    metrics_dir = tempfile.mkdtemp(prefix="rbfgate-metrics-") if settings.workers > 1 else None
    environ.pop(_MULTIPROCESS_ENVIRON, None)
    if metrics_dir is not None:
        environ[_MULTIPROCESS_ENVIRON] = metrics_dir
    environ.update(settings.to_environ())
    print(
        f"rbfgate serve: store {root}, http://{settings.host}:{settings.port}, {settings.workers} worker(s), "
        f"tokens {'from ' + str(settings.tokens_file) if settings.tokens_file else 'off'}",
        file=sys.stderr,
        flush=True,
    )
    try:
        import uvicorn

        uvicorn.run(
            "service.app:create_app_from_environ",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=settings.workers,
            access_log=False,  # one JSON line per request comes from the app itself
            server_header=False,
            log_level="info",
        )
    finally:
        if metrics_dir is not None:
            shutil.rmtree(metrics_dir, ignore_errors=True)
    return 0


def _check_port_free(host: str, port: int) -> None:
    """Fail with one clear line, rather than a server log, when the address is unusable."""
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except socket.gaierror as exc:
        raise InputError(f"--host {host!r}: cannot be resolved ({exc.strerror})") from None
    family, kind, proto, _, address = infos[0]
    with socket.socket(family, kind, proto) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind(address)
        except OSError as exc:
            raise InputError(f"cannot listen on {host}:{port}: {exc.strerror}; pick another --port or --host") from None


def _tokens_path(args: argparse.Namespace, environ: MutableMapping[str, str] = os.environ) -> Path:
    value = args.tokens or environ.get(_TOKENS_ENVIRON)
    if not value:
        raise InputError(f"no tokens file given; pass --tokens FILE or set {_TOKENS_ENVIRON}")
    return Path(value)


def _token_add(args: argparse.Namespace) -> int:
    path = _tokens_path(args)
    token, entry = add_token(path, args.name, args.role)
    print(f"Token {entry.name!r} (role {entry.role}) added to {path}; it is shown only this once: {token}")
    return 0


def _token_list(args: argparse.Namespace) -> int:
    path = _tokens_path(args)
    entries = read_tokens(path)
    if not entries:
        print(f"{path}: no tokens")
        return 0
    width = max(len(entry.name) for entry in entries)
    print(f"{'NAME':<{width}}  {'ROLE':<7}  {'CREATED':<20}  SHA256")
    for entry in entries:
        print(f"{entry.name:<{width}}  {entry.role:<7}  {entry.created:<20}  {entry.sha256[:12]}...")
    return 0


def _token_revoke(args: argparse.Namespace) -> int:
    path = _tokens_path(args)
    entry = revoke_token(path, args.name)
    print(f"Token {entry.name!r} (role {entry.role}) revoked; a running service refuses it within its poll interval")
    return 0
