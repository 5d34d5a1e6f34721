"""A bundle sent to other processes as bytes and verified once in each.

A Dask worker never receives a pickled ``Bundle``: it receives the bundle's
single-file form (the deterministic tar of ``model_store.archive``) and loads
it as ``load_bundle`` loads a file, checksums first, then checks that its
digest is the one the client loaded and replays the golden vectors. The
verified bundle is kept per process, so a worker verifies once, however many
partitions it scores.
"""

from __future__ import annotations

import io
import threading
from pathlib import Path

from model_store.archive import is_archive, pack_directory
from model_store.bundle import Bundle, load_bundle_bytes
from model_store.errors import IntegrityError

__all__ = ["bundle_bytes", "verified_bundle"]

_verified: dict[str, Bundle] = {}
_lock = threading.Lock()


def bundle_bytes(bundle: Bundle) -> bytes:
    """The single-file form of a loaded bundle: its archive's bytes, or its directory packed in memory."""
    source = Path(bundle.source)
    if is_archive(source):
        return source.read_bytes()
    buffer = io.BytesIO()
    pack_directory(source, buffer)
    return buffer.getvalue()


def verified_bundle(data: bytes, digest: str, *, source: str = "bundle sent by the client") -> Bundle:
    """The bundle in ``data``, checked (checksums, ``digest``, golden vectors) on first use in this process."""
    with _lock:
        bundle = _verified.get(digest)
        if bundle is None:
            bundle = load_bundle_bytes(data, source)
            if bundle.digest != digest:
                raise IntegrityError(
                    f"{source}: its digest is {bundle.digest[:16]}..., the client loaded {digest[:16]}...; the bundle "
                    "changed on disk while the run started, start it again"
                )
            bundle.self_test()
            _verified[digest] = bundle
        return bundle
