"""Reading files inside a store: regular files only, reached without following any symbolic link.

A store is read by the service and by auditors; what they read must be the
bytes that sit in the store. A symbolic link (say ``signature.json`` pointing
outside the store) or a FIFO, device or socket in place of a file could make a
reader ship or trust bytes from elsewhere, or hang forever on ``open``. So
every store read walks from the store root one component at a time with
``O_NOFOLLOW`` (``openat``-style, ``dir_fd``), opens the file with
``O_NONBLOCK`` (opening a FIFO would otherwise wait for a writer) and checks
``fstat`` says it is a regular file before reading a byte. The store root
itself may be a link (an operator's ``--store`` path); nothing below it may.
"""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path

from model_store.errors import StoreError

__all__ = ["UnsafeStoreEntry", "check_tree", "check_work_entry", "read_store_file", "store_entry_kind",
           "work_entry_error"]

_DIRECTORY_FLAGS = os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | os.O_CLOEXEC
_FILE_FLAGS = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC


class UnsafeStoreEntry(StoreError):
    """A path inside the store is a symbolic link or not a regular file (or directory) where one belongs.

    Callers re-raise it as the error of their layer (a damaged version, a tampered trail).
    """


def read_store_file(root: Path, path: Path) -> bytes | None:
    """The bytes of ``path`` (inside ``root``), or None when it does not exist.

    Raises ``UnsafeStoreEntry`` when ``path`` or a directory on the way to it is
    a symbolic link, or ``path`` is not a regular file; ``StoreError`` for other
    OS errors.
    """
    parts = _parts(root, path)
    directory = _open_root(root)
    try:
        for index, part in enumerate(parts[:-1]):
            try:
                child = os.open(part, _DIRECTORY_FLAGS, dir_fd=directory)
            except FileNotFoundError:
                return None
            except OSError as exc:
                raise _unsafe_or_error(root, parts[: index + 1], exc, directory=True) from exc
            os.close(directory)
            directory = child
        try:
            descriptor = os.open(parts[-1], _FILE_FLAGS, dir_fd=directory)
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise _unsafe_or_error(root, parts, exc, directory=False) from exc
    finally:
        os.close(directory)
    try:
        mode = os.fstat(descriptor).st_mode
        if not stat.S_ISREG(mode):
            raise UnsafeStoreEntry(
                f"{root.joinpath(*parts)}: is a {_kind(mode)}, not a regular file; a store holds only regular "
                "files, so it was placed there by hand: restore the file from a backup"
            )
        chunks = []
        while chunk := os.read(descriptor, 1 << 20):
            chunks.append(chunk)
        return b"".join(chunks)
    except OSError as exc:
        raise StoreError(f"{root.joinpath(*parts)}: cannot be read: {exc.strerror}") from exc
    finally:
        os.close(descriptor)


def store_entry_kind(root: Path, path: Path) -> str | None:
    """"file", "directory", or None when missing; ``UnsafeStoreEntry`` for a link or anything else."""
    parts = _parts(root, path)
    current = Path(root)
    for index, part in enumerate(parts):
        current = current / part
        try:
            mode = os.lstat(current).st_mode
        except FileNotFoundError:
            return None
        except NotADirectoryError:
            return None
        except OSError as exc:
            raise StoreError(f"{current}: cannot be examined: {exc.strerror}") from exc
        last = index == len(parts) - 1
        if stat.S_ISDIR(mode):
            if last:
                return "directory"
            continue
        if stat.S_ISREG(mode) and last:
            return "file"
        if stat.S_ISREG(mode):
            return None  # a file where a directory belongs: the path does not exist as such
        raise UnsafeStoreEntry(
            f"{current}: is a {_kind(mode)}; a store holds only regular files and directories, so it was placed "
            "there by hand: replace it with the original from a backup"
        )
    return "directory"


def check_tree(root: Path, directory: Path, *, subdirectories: frozenset[str] = frozenset()) -> list[str]:
    """The names of the regular files directly in ``directory``; ``UnsafeStoreEntry`` for anything else there
    except the real (not linked) ``subdirectories``."""
    if store_entry_kind(root, directory) != "directory":
        raise UnsafeStoreEntry(f"{directory}: is not a directory of the store")
    names = []
    for entry in sorted(os.listdir(directory)):
        mode = os.lstat(Path(directory) / entry).st_mode
        if stat.S_ISDIR(mode) and entry in subdirectories:
            continue
        if not stat.S_ISREG(mode):
            raise UnsafeStoreEntry(
                f"{Path(directory) / entry}: is a {_kind(mode)}, where only regular files belong; it was placed "
                "there by hand: remove it or restore the folder from a backup"
            )
        names.append(entry)
    return names


def check_work_entry(path: Path) -> bool:
    """Whether the store's own ``staging`` directory or ``lock`` file at ``path`` exists.

    ``UnsafeStoreEntry`` when something else is in its place: a symbolic link, a FIFO, a device, a
    socket, or a file where the directory belongs (or the reverse). rbfgate makes both itself, so
    anything else was put there by hand: every change empties ``staging/`` (a link there would make it
    delete and write the contents of another directory) and opens ``lock`` (a FIFO there would block,
    a link could make it create a file outside the store).
    """
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return False
    except OSError as exc:
        raise StoreError(f"{path}: cannot be examined: {exc.strerror}") from exc
    if (stat.S_ISREG if Path(path).name == "lock" else stat.S_ISDIR)(mode):
        return True
    raise work_entry_error(Path(path), mode)


def work_entry_error(path: Path, mode: int) -> UnsafeStoreEntry:
    """The one-line error for ``mode`` (``lstat``/``fstat``) found where ``staging/`` or ``lock`` belongs."""
    if path.name == "lock":
        found = "a symbolic link" if stat.S_ISLNK(mode) else f"not a regular file but a {_kind(mode)}"
        return UnsafeStoreEntry(
            f"{path}: the store lock is {found}; a store holds only regular files and directories, so it was put "
            "there by hand: remove it (the next change creates a new lock file)"
        )
    return UnsafeStoreEntry(
        f"{path}: is a {_kind(mode)}; staging/ must be the store's own directory (every change empties it), so it "
        "was put there by hand: remove it (the next change creates the directory again)"
    )


def _parts(root: Path, path: Path) -> tuple[str, ...]:
    try:
        parts = Path(path).relative_to(Path(root)).parts
    except ValueError:
        raise StoreError(f"{path}: is not inside the store {root}") from None
    if not parts or any(part in ("", ".", "..") for part in parts):
        raise StoreError(f"{path}: is not a file path inside the store {root}")
    return parts


def _open_root(root: Path) -> int:
    try:
        return os.open(root, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    except OSError as exc:
        raise StoreError(f"{root}: cannot open the store directory: {exc.strerror}") from exc


def _unsafe_or_error(root: Path, parts, exc: OSError, *, directory: bool) -> StoreError:
    where = root.joinpath(*parts)
    if exc.errno in (errno.ELOOP, errno.ENOTDIR) or (directory and exc.errno == errno.ENOTDIR):
        return UnsafeStoreEntry(
            f"{where}: is a symbolic link (or not a {'directory' if directory else 'regular file'}); a store is read "
            "without following links, so that no file from outside it is served: replace the link with the original"
        )
    return StoreError(f"{where}: cannot be opened: {exc.strerror}")


def _kind(mode: int) -> str:
    for test, name in (
        (stat.S_ISLNK, "symbolic link"), (stat.S_ISFIFO, "FIFO (named pipe)"), (stat.S_ISSOCK, "socket"),
        (stat.S_ISCHR, "character device"), (stat.S_ISBLK, "block device"), (stat.S_ISDIR, "directory"),
        (stat.S_ISREG, "regular file"),
    ):
        if test(mode):
            return name
    return "special file"
