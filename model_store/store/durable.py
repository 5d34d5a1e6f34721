"""Crash-safe file operations: atomic replace, durable append, fsync of directories.

A store lives on a shared volume and its writers may be killed at any
moment, so every change is either a rename of a fully written and fsynced
temporary (files, published versions) or a single append of complete lines
(the history). Temporary names start with ``.tmp-`` so that the store can
recognise and discard what an interrupted writer left behind.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

__all__ = ["TEMP_PREFIX", "append_bytes", "atomic_write", "fsync_directory", "fsync_tree", "temporary_name"]

TEMP_PREFIX = ".tmp-"


def temporary_name(final_name: str) -> str:
    """A unique hidden sibling name for ``final_name`` (same directory, so a rename stays atomic)."""
    return f"{TEMP_PREFIX}{final_name}-{secrets.token_hex(6)}"


def fsync_directory(path: Path) -> None:
    """Make the directory entries of ``path`` (creations, renames) durable."""
    descriptor = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def atomic_write(path: Path, data: bytes) -> None:
    """Replace ``path`` with ``data``: write a temporary, fsync it, rename it over, fsync the directory.

    A reader sees either the old content or the new one, never a mixture,
    and after a crash the file holds one of the two.
    """
    path = Path(path)
    temporary = path.with_name(temporary_name(path.name))
    try:
        with open(temporary, "xb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    fsync_directory(path.parent)


def append_bytes(path: Path, data: bytes) -> None:
    """Append ``data`` with one ``write`` on an ``O_APPEND`` descriptor, then fsync.

    One write call keeps concurrent readers from seeing a line split across
    two writes; the store lock keeps writers from interleaving.
    """
    path = Path(path)
    created = not path.exists()
    descriptor = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        written = os.write(descriptor, data)
        while written < len(data):  # a short write (signal, full pipe) continues where it stopped
            written += os.write(descriptor, data[written:])
        os.fsync(descriptor)
    finally:
        os.close(descriptor)
    if created:
        fsync_directory(path.parent)


def fsync_tree(root: Path) -> None:
    """Fsync every file and directory under ``root`` (deepest first), then ``root`` itself."""
    root = Path(root)
    for directory, _, files in os.walk(root, topdown=False):
        for name in files:
            descriptor = os.open(Path(directory) / name, os.O_RDONLY)
            try:
                os.fsync(descriptor)
            finally:
                os.close(descriptor)
        fsync_directory(Path(directory))
