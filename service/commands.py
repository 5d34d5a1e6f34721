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
import dataclasses
import os
import resource
import shutil
import socket
import sys
import tempfile
from collections.abc import Mapping, MutableMapping
from pathlib import Path

from model_store.errors import InputError
from service.settings import (
    DEFAULT_HOST,
    DEFAULT_MAX_BODY_BYTES,
    DEFAULT_MAX_CONNECTIONS,
    DEFAULT_MAX_RECORDS,
    DEFAULT_PINNED_CACHE_BYTES,
    DEFAULT_POLL_SECONDS,
    DEFAULT_PORT,
    DEFAULT_SAMPLE_SIZE,
    DEFAULT_SCORING_QUEUE,
    DEFAULT_SCORING_THREADS,
    Settings,
)
from service.tokens import ROLES, add_token, read_tokens, revoke_token

__all__ = ["register", "serve_settings"]

_TOKENS_ENVIRON = "RBFGATE_TOKENS"
_MULTIPROCESS_ENVIRON = "PROMETHEUS_MULTIPROC_DIR"
_GRACEFUL_SHUTDOWN_SECONDS = 30
# Seconds for a whole request to arrive (service.http_limits); generous for a 1 MiB body.
DEFAULT_READ_TIMEOUT = 20.0


def register(subparsers) -> None:
    """Add ``serve`` and ``token`` to the ``rbfgate`` parser."""
    serve = subparsers.add_parser(
        "serve",
        help="run the HTTP scoring service on a store",
        description="Serve the active version of every model in the store over HTTP, following version switches.",
    )
    # Options left out fall back to their environment variable (service.settings.ENVIRON_KEYS),
    # then to the default, so a container can be configured through its environment alone.
    serve.add_argument("--store", metavar="DIR", help="the store (default: $RBFGATE_STORE, else the per-user store)")
    serve.add_argument("--host", help=f"address to listen on (default $RBFGATE_SERVE_HOST, else {DEFAULT_HOST})")
    serve.add_argument("--port", type=int, help=f"TCP port (default $RBFGATE_SERVE_PORT, else {DEFAULT_PORT})")
    serve.add_argument("--workers", type=int, help="worker processes (default $RBFGATE_SERVE_WORKERS, else 1)")
    serve.add_argument("--tokens", metavar="FILE", help=f"tokens file (default ${_TOKENS_ENVIRON}); without one, "
                       "scoring and metadata are open and history, bundles and version changes are refused")
    serve.add_argument("--max-records", type=int,
                       help=f"most records per scoring request (default {DEFAULT_MAX_RECORDS})")
    serve.add_argument("--max-body-bytes", type=int,
                       help=f"largest request body in bytes (default {DEFAULT_MAX_BODY_BYTES})")
    serve.add_argument("--poll-interval", type=float, metavar="SECONDS",
                       help=f"seconds between reads of the active versions (default {DEFAULT_POLL_SECONDS:g})")
    serve.add_argument("--preview-sample", type=int, metavar="N",
                       help=f"recent records kept per model for the swap preview (default {DEFAULT_SAMPLE_SIZE})")
    serve.add_argument("--log-inputs", action="store_true", default=None,
                       help="write feature values into the request log")
    serve.add_argument("--scoring-threads", type=int, metavar="N",
                       help=f"threads per worker that score large requests (default {DEFAULT_SCORING_THREADS})")
    serve.add_argument("--scoring-queue", type=int, metavar="N",
                       help="large requests per worker that may wait for a scoring thread; more are answered 503 "
                       f"with Retry-After (default {DEFAULT_SCORING_QUEUE})")
    serve.add_argument("--pinned-cache-bytes", type=int, metavar="BYTES",
                       help="bytes of pinned (non-active) versions each worker keeps loaded "
                       f"(default {DEFAULT_PINNED_CACHE_BYTES})")
    serve.add_argument("--max-connections", type=int, metavar="N",
                       help="open connections per worker; past it the connection waiting longest for its request is "
                       f"closed; lowered to fit the descriptor limit (default {DEFAULT_MAX_CONNECTIONS})")
    serve.add_argument("--read-timeout", type=float, default=DEFAULT_READ_TIMEOUT, metavar="SECONDS",
                       help="seconds a request may take to arrive completely, from the connection opening or the "
                       f"previous response; slower connections are closed (default {DEFAULT_READ_TIMEOUT:g})")
    serve.set_defaults(handler=_serve)

    token = subparsers.add_parser("token", help="manage the service's tokens",
                                  description="Create, list and revoke the bearer tokens of `rbfgate serve`.")
    actions = token.add_subparsers(dest="token_action", metavar="ACTION", required=True)
    add = actions.add_parser("add", help="create a token (printed once, stored only as its SHA-256)")
    add.add_argument("name", help="who holds the token; recorded as the actor in the history")
    add.add_argument("--role", required=True, choices=ROLES, help="score, operate or audit")
    add.add_argument("--quiet", action="store_true", help="print the token alone, for scripts")
    listing = actions.add_parser("list", help="list token names and roles (never the tokens)")
    revoke = actions.add_parser("revoke", help="remove a token; a running service refuses it within a poll interval")
    revoke.add_argument("name")
    for parser in (add, listing, revoke):
        parser.add_argument("--tokens", metavar="FILE", help=f"the tokens file (default ${_TOKENS_ENVIRON})")
    add.set_defaults(handler=_token_add)
    listing.set_defaults(handler=_token_list)
    revoke.set_defaults(handler=_token_revoke)


def serve_settings(args: argparse.Namespace, environ: Mapping[str, str]) -> Settings:
    """The settings ``serve`` runs with: each option given on the command line, else its
    environment variable (``service.settings.ENVIRON_KEYS``), else its default."""
    from model_store.store import Store, resolve_store_root

    root = resolve_store_root(args.store, environ)
    Store(root)  # a missing or foreign store stops here with the store's own message
    tokens = args.tokens or environ.get(_TOKENS_ENVIRON) or ""
    from_environment = Settings.from_environ({**environ, "RBFGATE_STORE": str(root), _TOKENS_ENVIRON: tokens})
    given = {
        "host": args.host,
        "port": args.port,
        "workers": args.workers,
        "max_records": args.max_records,
        "max_body_bytes": args.max_body_bytes,
        "poll_seconds": args.poll_interval,
        "sample_size": args.preview_sample,
        "log_inputs": args.log_inputs,
        "scoring_threads": args.scoring_threads,
        "scoring_queue": args.scoring_queue,
        "pinned_cache_bytes": args.pinned_cache_bytes,
        "max_connections": args.max_connections,
    }
    return dataclasses.replace(from_environment, **{key: value for key, value in given.items() if value is not None})


def _serve(args: argparse.Namespace, environ: MutableMapping[str, str] = os.environ) -> int:
    settings = serve_settings(args, environ)
    root = settings.store_root
    if not 0.5 <= args.read_timeout <= 3600:  # also refuses NaN
        raise InputError(f"--read-timeout must be between 0.5 and 3600 seconds; got {args.read_timeout}")
    if settings.tokens_file is not None:
        read_tokens(settings.tokens_file)  # unreadable or malformed: refuse to start
    _check_port_free(settings.host, settings.port)
    from service.http_limits import connection_cap

    connections = connection_cap(settings.max_connections, resource.getrlimit(resource.RLIMIT_NOFILE)[0])
    metrics_dir = tempfile.mkdtemp(prefix="rbfgate-metrics-") if settings.workers > 1 else None
    environ.pop(_MULTIPROCESS_ENVIRON, None)
    if metrics_dir is not None:
        environ[_MULTIPROCESS_ENVIRON] = metrics_dir
    environ.update(settings.to_environ())
    print(
        f"rbfgate serve: store {root}, http://{settings.host}:{settings.port}, {settings.workers} worker(s), "
        f"tokens {'from ' + str(settings.tokens_file) if settings.tokens_file else 'off'}, "
        f"at most {connections} connections and {settings.scoring_threads} + {settings.scoring_queue} "
        "large scoring requests per worker; "
        f"pages at http://{_browsable(settings.host)}:{settings.port}/view/",
        file=sys.stderr,
        flush=True,
    )
    try:
        import uvicorn

        from service.http_limits import KEEP_ALIVE_SECONDS, MAX_HEADER_BYTES, protocol_factory

        uvicorn.run(
            "service.app:create_app_from_environ",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=settings.workers,
            access_log=False,  # one JSON line per request comes from the app itself
            server_header=False,
            log_level="info",
            # Limits (README, "faults and abuse"): a whole request within --read-timeout, idle
            # keep-alive connections closed after 5 s, request line and headers at most 16 KiB,
            # at most `connections` open connections (the slowest shed first), at most 30 s for
            # in-flight requests to finish on shutdown. Not uvicorn's limit_concurrency: past it
            # uvicorn answers every new request 503, so slow clients could lock others out.
            http=protocol_factory(args.read_timeout, connections),
            timeout_keep_alive=KEEP_ALIVE_SECONDS,
            h11_max_incomplete_event_size=MAX_HEADER_BYTES,
            timeout_graceful_shutdown=_GRACEFUL_SHUTDOWN_SECONDS,
        )
    finally:
        if metrics_dir is not None:
            shutil.rmtree(metrics_dir, ignore_errors=True)
    return 0


def _browsable(host: str) -> str:
    """The address a browser on this machine opens: a wildcard listen address is not one."""
    if host in ("0.0.0.0", ""):  # nosec B104 - compares the listen address, binds nothing
        return "127.0.0.1"
    if host == "::":
        return "[::1]"
    return f"[{host}]" if ":" in host else host


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
    if args.quiet:
        print(token)
    else:
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
