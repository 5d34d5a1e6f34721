"""The store lock: one ``flock`` on ``ROOT/lock`` serialises every change.

``flock`` locks belong to an open file description, so two processes, or
two threads that each open the file, exclude each other; the kernel drops
the lock when the holder dies, so a killed operator never leaves the store
locked. Writers take it exclusively; auditors reading the history take it
shared so they never see a trail and a pointer from two different moments.
A read-only store can still be locked shared (``flock`` needs no write
access), and a reader that cannot open the file at all reads unlocked.
"""

from __future__ import annotations

import errno
import fcntl
import os
import stat
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

from model_store.errors import LockTimeoutError, StoreError
from model_store.store.files import UnsafeStoreEntry, check_work_entry, work_entry_error

__all__ = ["exclusive_lock", "shared_lock"]

_POLL_SECONDS = 0.02
# Never follow a link (its target may lie outside the store, and O_CREAT would create a file there),
# never wait on a FIFO put in the lock's place (opening one for reading blocks until a writer comes).
_NO_LINK_NO_WAIT = os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC


@contextmanager
def exclusive_lock(path: Path, timeout: float, *, sleep: Callable[[float], None] = time.sleep) -> Iterator[None]:
    """Hold the store lock exclusively; raise ``StoreError`` if the store cannot be written."""
    try:
        descriptor = os.open(path, os.O_RDWR | os.O_CREAT | _NO_LINK_NO_WAIT, 0o644)
    except FileNotFoundError as exc:
        raise StoreError(
            f"{path.parent}: cannot change this store: the store directory no longer exists; "
            "restore it or point --store at the store"
        ) from exc
    except OSError as exc:
        # A symbolic link (ELOOP), a FIFO without a reader or a socket (ENXIO), a directory (EISDIR).
        if exc.errno in (errno.ELOOP, errno.ENXIO, errno.EISDIR):
            raise _not_a_lock(path) from exc
        raise StoreError(
            f"{path.parent}: cannot change this store: opening its lock file failed ({_describe(exc)}); "
            "the store is read-only or belongs to another user, use a writable --store"
        ) from exc
    try:
        _check_regular(descriptor, path)
        _acquire(descriptor, fcntl.LOCK_EX, path, timeout, sleep)
        yield
    finally:
        os.close(descriptor)  # closing the descriptor releases the lock


@contextmanager
def shared_lock(path: Path, timeout: float, *, sleep: Callable[[float], None] = time.sleep) -> Iterator[None]:
    """Hold the store lock shared, or nothing when the lock file cannot be opened for reading."""
    try:
        descriptor = os.open(path, os.O_RDONLY | _NO_LINK_NO_WAIT)
    except OSError as exc:
        if exc.errno in (errno.ELOOP, errno.ENXIO):  # a symbolic link; a socket (opening one fails with ENXIO)
            raise _not_a_lock(path) from exc
        yield
        return
    try:
        _check_regular(descriptor, path)
        _acquire(descriptor, fcntl.LOCK_SH, path, timeout, sleep)
        yield
    finally:
        os.close(descriptor)


def _acquire(descriptor: int, mode: int, path: Path, timeout: float, sleep) -> None:
    deadline = time.monotonic() + timeout
    while True:
        try:
            fcntl.flock(descriptor, mode | fcntl.LOCK_NB)
            return
        except OSError as exc:
            if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise StoreError(f"{path}: cannot lock the store: {_describe(exc)}") from exc
        if time.monotonic() >= deadline:
            raise LockTimeoutError(
                f"{path.parent}: another rbfgate command held the store lock for more than {timeout:g} s; "
                "wait for it to finish and try again"
            )
        sleep(_POLL_SECONDS)


def _check_regular(descriptor: int, path: Path) -> None:
    mode = os.fstat(descriptor).st_mode
    if not stat.S_ISREG(mode):
        raise work_entry_error(path, mode)


def _not_a_lock(path: Path) -> UnsafeStoreEntry:
    """The error naming what is in the lock's place (``open`` refused it; ``lstat`` says what it is)."""
    try:
        check_work_entry(path)
    except UnsafeStoreEntry as exc:
        return exc
    return work_entry_error(path, stat.S_IFLNK)  # replaced meanwhile; O_NOFOLLOW refused a link


def _describe(exc: OSError) -> str:
    return exc.strerror or type(exc).__name__
