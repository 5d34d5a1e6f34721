"""Service settings: one frozen value built from the command line or the environment.

``rbfgate serve`` builds ``Settings`` from its arguments and, because uvicorn
starts each worker as a fresh process, hands them to the workers as
environment variables (``to_environ``) that ``from_environ`` reads back.
Every value is checked here, at the boundary, so the rest of the service
trusts it. ``rbfgate serve`` also starts from these variables, and its
command-line options override them, so a container sets the service up
through its environment alone (``ENVIRON_KEYS`` lists every variable):

    RBFGATE_STORE                  store root (the same variable the store commands read)
    RBFGATE_TOKENS                 tokens file; empty or unset: no tokens
    RBFGATE_SERVE_HOST             address to listen on
    RBFGATE_SERVE_PORT             TCP port
    RBFGATE_SERVE_WORKERS          worker processes
    RBFGATE_SERVE_MAX_RECORDS      records per scoring request
    RBFGATE_SERVE_MAX_BODY_BYTES   request body limit in bytes
    RBFGATE_SERVE_POLL_SECONDS     seconds between polls of the store
    RBFGATE_SERVE_SAMPLE_SIZE      recent records kept per model for the preview
    RBFGATE_SERVE_LOG_INPUTS       "1" to log feature values
    RBFGATE_SERVE_SCORING_THREADS  threads per worker that score large requests
    RBFGATE_SERVE_SCORING_QUEUE    large requests per worker that may wait for a scoring thread
    RBFGATE_SERVE_PINNED_CACHE_BYTES  bytes of pinned (non-active) versions kept loaded per worker
    RBFGATE_SERVE_MAX_CONNECTIONS  open connections per worker (lowered to fit the descriptor limit)
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType

from model_store.errors import InputError

__all__ = [
    "DEFAULT_HOST",
    "DEFAULT_MAX_BODY_BYTES",
    "DEFAULT_MAX_CONNECTIONS",
    "DEFAULT_MAX_RECORDS",
    "DEFAULT_PINNED_CACHE_BYTES",
    "DEFAULT_POLL_SECONDS",
    "DEFAULT_PORT",
    "DEFAULT_SAMPLE_SIZE",
    "DEFAULT_SCORING_QUEUE",
    "DEFAULT_SCORING_THREADS",
    "ENVIRON_KEYS",
    "Settings",
]

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8000
DEFAULT_MAX_RECORDS = 1000
DEFAULT_MAX_BODY_BYTES = 1024 * 1024
DEFAULT_POLL_SECONDS = 1.0
DEFAULT_SAMPLE_SIZE = 256
# Measured costs behind these defaults are in the README (sizing and promises sections).
DEFAULT_SCORING_THREADS = 1
DEFAULT_SCORING_QUEUE = 16
DEFAULT_PINNED_CACHE_BYTES = 128 * 1024 * 1024
DEFAULT_MAX_CONNECTIONS = 1000

# Settings field -> the environment variable that carries it (deployment
# manifests are checked against this table, so a rename cannot leave them stale).
ENVIRON_KEYS: Mapping[str, str] = MappingProxyType({
    "store_root": "RBFGATE_STORE",
    "tokens_file": "RBFGATE_TOKENS",
    "host": "RBFGATE_SERVE_HOST",
    "port": "RBFGATE_SERVE_PORT",
    "workers": "RBFGATE_SERVE_WORKERS",
    "max_records": "RBFGATE_SERVE_MAX_RECORDS",
    "max_body_bytes": "RBFGATE_SERVE_MAX_BODY_BYTES",
    "poll_seconds": "RBFGATE_SERVE_POLL_SECONDS",
    "sample_size": "RBFGATE_SERVE_SAMPLE_SIZE",
    "log_inputs": "RBFGATE_SERVE_LOG_INPUTS",
    "scoring_threads": "RBFGATE_SERVE_SCORING_THREADS",
    "scoring_queue": "RBFGATE_SERVE_SCORING_QUEUE",
    "pinned_cache_bytes": "RBFGATE_SERVE_PINNED_CACHE_BYTES",
    "max_connections": "RBFGATE_SERVE_MAX_CONNECTIONS",
})


@dataclass(frozen=True)
class Settings:
    """What one service process needs to know.

    store_root:      the store directory (``model_store.store.Store``)
    tokens_file:     the tokens file, or None to run without tokens (see service.auth)
    max_records:     most records one scoring request may hold
    max_body_bytes:  largest request body read, in bytes
    poll_seconds:    seconds between two reads of the store's active pointers
    sample_size:     recently scored records kept per model for the swap preview
    log_inputs:      write feature values into the request log (off by default)
    scoring_threads: threads that score requests too large for the event loop (service.admission)
    scoring_queue:   such requests that may wait for a thread; more get 503 with Retry-After
    pinned_cache_bytes: budget of the pinned-version cache, in bytes of loaded arrays
    max_connections: open connections per worker; the oldest incomplete one is shed past it
                     (service.http_limits); `rbfgate serve` lowers it to fit the descriptor limit
    """

    store_root: Path
    tokens_file: Path | None = None
    host: str = DEFAULT_HOST
    port: int = DEFAULT_PORT
    workers: int = 1
    max_records: int = DEFAULT_MAX_RECORDS
    max_body_bytes: int = DEFAULT_MAX_BODY_BYTES
    poll_seconds: float = DEFAULT_POLL_SECONDS
    sample_size: int = DEFAULT_SAMPLE_SIZE
    log_inputs: bool = False
    scoring_threads: int = DEFAULT_SCORING_THREADS
    scoring_queue: int = DEFAULT_SCORING_QUEUE
    pinned_cache_bytes: int = DEFAULT_PINNED_CACHE_BYTES
    max_connections: int = DEFAULT_MAX_CONNECTIONS

    def __post_init__(self) -> None:
        object.__setattr__(self, "store_root", Path(self.store_root))
        if self.tokens_file is not None:
            object.__setattr__(self, "tokens_file", Path(self.tokens_file))
        _at_least("--workers", "workers", self.workers, 1)
        _at_least("--max-records", "max_records", self.max_records, 1)
        _at_least("--max-body-bytes", "max_body_bytes", self.max_body_bytes, 64)
        _at_least("--preview-sample", "sample_size", self.sample_size, 0)
        _at_least("--scoring-threads", "scoring_threads", self.scoring_threads, 1)
        _at_least("--scoring-queue", "scoring_queue", self.scoring_queue, 0)
        _at_least("--pinned-cache-bytes", "pinned_cache_bytes", self.pinned_cache_bytes, 0)
        _at_least("--max-connections", "max_connections", self.max_connections, 8)
        if not isinstance(self.host, str) or not self.host:
            raise InputError(f"{_option('--host', 'host')} must be an address to listen on; got {self.host!r}")
        _at_least("--port", "port", self.port, 0)
        if not 0 <= self.port <= 65535:
            raise InputError(f"{_option('--port', 'port')} must be between 0 and 65535; got {self.port}")
        if not (isinstance(self.poll_seconds, (int, float)) and math.isfinite(self.poll_seconds)):
            raise InputError(
                f"{_option('--poll-interval', 'poll_seconds')} must be a number of seconds; got {self.poll_seconds!r}"
            )
        if not 0.05 <= self.poll_seconds <= 3600:
            raise InputError(
                f"{_option('--poll-interval', 'poll_seconds')} must be between 0.05 and 3600 seconds; "
                f"got {self.poll_seconds}"
            )

    def to_environ(self) -> dict[str, str]:
        """The environment variables from which ``from_environ`` rebuilds these settings."""
        return {
            "RBFGATE_STORE": str(self.store_root),
            "RBFGATE_SERVE_HOST": self.host,
            "RBFGATE_SERVE_PORT": str(self.port),
            "RBFGATE_SERVE_WORKERS": str(self.workers),
            "RBFGATE_SERVE_MAX_RECORDS": str(self.max_records),
            "RBFGATE_SERVE_MAX_BODY_BYTES": str(self.max_body_bytes),
            "RBFGATE_SERVE_POLL_SECONDS": repr(float(self.poll_seconds)),
            "RBFGATE_SERVE_SAMPLE_SIZE": str(self.sample_size),
            "RBFGATE_SERVE_LOG_INPUTS": "1" if self.log_inputs else "0",
            "RBFGATE_SERVE_SCORING_THREADS": str(self.scoring_threads),
            "RBFGATE_SERVE_SCORING_QUEUE": str(self.scoring_queue),
            "RBFGATE_SERVE_PINNED_CACHE_BYTES": str(self.pinned_cache_bytes),
            "RBFGATE_SERVE_MAX_CONNECTIONS": str(self.max_connections),
            "RBFGATE_TOKENS": "" if self.tokens_file is None else str(self.tokens_file),
        }

    @classmethod
    def from_environ(cls, environ: Mapping[str, str]) -> "Settings":
        """Settings from ``environ`` (``os.environ`` in a worker, a dict in tests)."""
        store = environ.get("RBFGATE_STORE", "")
        if not store:
            raise InputError("RBFGATE_STORE is not set; start the service with `rbfgate serve --store DIR`")
        tokens = environ.get("RBFGATE_TOKENS", "")
        return cls(
            store_root=Path(store),
            tokens_file=Path(tokens) if tokens else None,
            host=environ.get("RBFGATE_SERVE_HOST", "") or DEFAULT_HOST,
            port=_integer(environ, "RBFGATE_SERVE_PORT", DEFAULT_PORT),
            workers=_integer(environ, "RBFGATE_SERVE_WORKERS", 1),
            max_records=_integer(environ, "RBFGATE_SERVE_MAX_RECORDS", DEFAULT_MAX_RECORDS),
            max_body_bytes=_integer(environ, "RBFGATE_SERVE_MAX_BODY_BYTES", DEFAULT_MAX_BODY_BYTES),
            poll_seconds=_number(environ, "RBFGATE_SERVE_POLL_SECONDS", DEFAULT_POLL_SECONDS),
            sample_size=_integer(environ, "RBFGATE_SERVE_SAMPLE_SIZE", DEFAULT_SAMPLE_SIZE),
            log_inputs=environ.get("RBFGATE_SERVE_LOG_INPUTS", "0") == "1",
            scoring_threads=_integer(environ, "RBFGATE_SERVE_SCORING_THREADS", DEFAULT_SCORING_THREADS),
            scoring_queue=_integer(environ, "RBFGATE_SERVE_SCORING_QUEUE", DEFAULT_SCORING_QUEUE),
            pinned_cache_bytes=_integer(environ, "RBFGATE_SERVE_PINNED_CACHE_BYTES", DEFAULT_PINNED_CACHE_BYTES),
            max_connections=_integer(environ, "RBFGATE_SERVE_MAX_CONNECTIONS", DEFAULT_MAX_CONNECTIONS),
        )


def _option(option: str, field: str) -> str:
    """Both spellings of a setting, since a value may come from the command line or the environment."""
    return f"{option} (or {ENVIRON_KEYS[field]})"


def _at_least(option: str, field: str, value: int, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise InputError(f"{_option(option, field)} must be a whole number >= {low}; got {value!r}")


def _integer(environ: Mapping[str, str], key: str, default: int) -> int:
    text = environ.get(key, "")
    if not text:
        return default
    try:
        return int(text)
    except ValueError:
        raise InputError(f"{key}={text!r} is not a whole number") from None


def _number(environ: Mapping[str, str], key: str, default: float) -> float:
    text = environ.get(key, "")
    if not text:
        return default
    try:
        return float(text)
    except ValueError:
        raise InputError(f"{key}={text!r} is not a number of seconds") from None
