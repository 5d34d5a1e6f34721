"""The single-file form of a bundle: an uncompressed POSIX tar of its files.

Packing writes the manifest first, then the listed files in sorted order,
with fixed owner, mode and time, so the same bundle always packs to the same
bytes. Reading never extracts anything to disk by itself: it returns the
member bytes after refusing absolute paths, ``..``, links, devices,
directories, duplicate names, oversized members and any file the manifest
does not list.

Reading costs at most the archive's own size in memory, decided from the
headers before any member is read: sparse members (GNU sparse, in any of its
PAX forms) are refused, because their header may promise gigabytes of holes
that a 40 KB file does not hold, and every member's data must lie inside the
file.
"""

from __future__ import annotations

import io
import os
import tarfile
from pathlib import Path, PurePosixPath

from model_store.errors import BundleFormatError, UnsafeArchiveError
from model_store.manifest import MANIFEST_FILE, MAX_MANIFEST_BYTES, MAX_MANIFEST_DEPTH, SIGNATURE_FILE
from model_store.strict_json import loads_strict

__all__ = ["MAX_MEMBER_BYTES", "is_archive", "pack_directory", "pack_members", "read_archive"]

MAX_MEMBER_BYTES = 2 * 1024**3  # per entry and in total: the archive is read into memory
_MAX_MEMBERS = 64
# PAX keywords of the GNU sparse formats 0.0, 0.1 and 1.0 (GNU tar manual, "Storing Sparse Files").
_SPARSE_KEYS = frozenset({"GNU.sparse.size", "GNU.sparse.map", "GNU.sparse.numblocks", "GNU.sparse.offset",
                          "GNU.sparse.numbytes", "GNU.sparse.realsize", "GNU.sparse.major", "GNU.sparse.minor",
                          "GNU.sparse.name"})


def is_archive(path: Path) -> bool:
    """True when ``path`` is a file (the single-file form) rather than a bundle directory."""
    return Path(path).is_file()


def pack_directory(bundle_dir: Path, out: Path | io.BufferedIOBase) -> None:
    """Write the bundle in ``bundle_dir`` as a deterministic tar to a path or binary stream."""
    bundle_dir = Path(bundle_dir)
    try:
        manifest = loads_strict((bundle_dir / MANIFEST_FILE).read_text(encoding="utf-8"), max_depth=MAX_MANIFEST_DEPTH)
        names = [MANIFEST_FILE, *sorted(manifest.get("files", {}))]
    except (OSError, ValueError, AttributeError) as exc:
        raise BundleFormatError(f"{bundle_dir}: no readable {MANIFEST_FILE} to pack: {exc}") from exc
    for name in names:
        # Listed names come from a manifest; never let one reach outside the bundle directory.
        if PurePosixPath(name).name != name or name in ("", ".", "..") or "\\" in name:
            raise UnsafeArchiveError(f"{bundle_dir}/{MANIFEST_FILE}: lists {name!r}, which is not a plain file name")
    if (bundle_dir / SIGNATURE_FILE).is_file():
        names.append(SIGNATURE_FILE)
    if not isinstance(out, (str, Path)):
        _write_tar(bundle_dir, names, out)
        return
    # Written beside the target and renamed, so a failure never leaves a half-written archive.
    partial = Path(out).with_name(f".{Path(out).name}.partial")
    try:
        with open(partial, "wb") as handle:
            _write_tar(bundle_dir, names, handle)
        os.replace(partial, out)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise


def _write_tar(bundle_dir: Path, names: list[str], handle) -> None:
    members = {}
    for name in names:
        try:
            members[name] = (bundle_dir / name).read_bytes()
        except OSError as exc:
            raise BundleFormatError(f"{bundle_dir}/{name}: cannot read it to pack: {exc.strerror}") from exc
    pack_members(members, handle)


def pack_members(members: dict[str, bytes], handle) -> None:
    """Write ``{file name: bytes}`` as the deterministic tar to ``handle``: the manifest, the other files sorted,
    the signature last (the order ``pack_directory`` writes)."""
    names = sorted(members, key=lambda name: ({MANIFEST_FILE: 0, SIGNATURE_FILE: 2}.get(name, 1), name))
    with tarfile.open(fileobj=handle, mode="w", format=tarfile.PAX_FORMAT) as tar:
        for name in names:
            data = members[name]
            info = tarfile.TarInfo(name)
            info.size = len(data)
            info.mode = 0o644
            info.mtime = 0
            info.uname = info.gname = ""
            tar.addfile(info, io.BytesIO(data))


def read_archive(path: Path, data: bytes | None = None) -> dict[str, bytes]:
    """Return ``{member name: bytes}`` for a safe bundle archive, else raise ``UnsafeArchiveError``.

    ``data``, when given, is the archive's bytes (held in memory); ``path`` then only names it in messages.
    """
    try:
        handle = io.BytesIO(data) if data is not None else open(path, "rb")
        size = len(data) if data is not None else os.fstat(handle.fileno()).st_size
        with handle, tarfile.open(fileobj=handle, mode="r:") as tar:
            members = _checked_members(path, tar, size)
            contents = {member.name: _read_member(tar, member) for member in members}
    except (tarfile.TarError, ValueError, OverflowError) as exc:
        # tarfile parses pax and GNU sparse headers itself; a forged one fails there with ValueError.
        raise BundleFormatError(f"{path}: not a bundle archive (uncompressed tar expected): {str(exc)[:200]}") from exc
    except OSError as exc:
        raise BundleFormatError(f"{path}: cannot read the archive: {exc.strerror or exc}") from exc
    if MANIFEST_FILE not in contents:
        raise BundleFormatError(f"{path}: archive has no {MANIFEST_FILE}; it is not a bundle")
    try:
        document = loads_strict(contents[MANIFEST_FILE].decode("utf-8"), max_depth=MAX_MANIFEST_DEPTH)
        listed = set(document.get("files", {}))
    except (ValueError, AttributeError, TypeError) as exc:  # StrictJsonError and UnicodeDecodeError are ValueErrors
        raise BundleFormatError(f"{path}: {MANIFEST_FILE} is not a JSON object: {exc}") from exc
    allowed = listed | {MANIFEST_FILE, SIGNATURE_FILE}
    unexpected = sorted(set(contents) - allowed)
    if unexpected:
        raise UnsafeArchiveError(
            f"{path}: archive holds {unexpected[0]!r}, which the manifest does not list; "
            "a bundle archive may only hold the manifest, its signature and the listed files"
        )
    return contents


def _checked_members(path: Path, tar: tarfile.TarFile, archive_bytes: int) -> list[tarfile.TarInfo]:
    members = []
    seen: set[str] = set()
    total = 0
    for member in tar:
        if len(members) >= _MAX_MEMBERS:
            raise UnsafeArchiveError(f"{path}: more than {_MAX_MEMBERS} entries; not a bundle archive")
        name = member.name
        pure = PurePosixPath(name)
        if name.startswith("/") or pure.is_absolute() or "\\" in name:
            raise UnsafeArchiveError(f"{path}: entry {name!r} has an absolute path; refusing to unpack")
        if ".." in pure.parts:
            raise UnsafeArchiveError(f"{path}: entry {name!r} climbs out with '..'; refusing to unpack")
        if member.issym() or member.islnk():
            raise UnsafeArchiveError(f"{path}: entry {name!r} is a link; bundle archives hold regular files only")
        if not member.isreg():
            raise UnsafeArchiveError(
                f"{path}: entry {name!r} is not a regular file (directory, device or fifo); refusing to unpack"
            )
        if len(pure.parts) != 1:
            raise UnsafeArchiveError(f"{path}: entry {name!r} is inside a folder; bundle files sit at the top")
        if name in seen:
            raise UnsafeArchiveError(f"{path}: entry {name!r} appears twice; refusing an ambiguous archive")
        if member.sparse is not None or member.type == tarfile.GNUTYPE_SPARSE or _SPARSE_KEYS & set(member.pax_headers):
            raise UnsafeArchiveError(
                f"{path}: entry {name!r} is a sparse file; bundle archives hold plain files only (pack with 'rbfgate pack')"
            )
        if member.size > MAX_MEMBER_BYTES:
            raise UnsafeArchiveError(f"{path}: entry {name!r} is {member.size} bytes, over the {MAX_MEMBER_BYTES} limit")
        if member.offset_data + member.size > archive_bytes:
            raise UnsafeArchiveError(
                f"{path}: entry {name!r} claims {member.size} bytes, but the archive ends {archive_bytes - member.offset_data} "
                "bytes after its header; the archive is truncated or forged"
            )
        if name == MANIFEST_FILE and member.size > MAX_MANIFEST_BYTES:
            raise UnsafeArchiveError(
                f"{path}: {MANIFEST_FILE} is {member.size} bytes, over the {MAX_MANIFEST_BYTES}-byte manifest limit"
            )
        total += member.size
        if total > MAX_MEMBER_BYTES:
            raise UnsafeArchiveError(f"{path}: entries add up to more than {MAX_MEMBER_BYTES} bytes; refusing to read")
        seen.add(name)
        members.append(member)
    return members


def _read_member(tar: tarfile.TarFile, member: tarfile.TarInfo) -> bytes:
    handle = tar.extractfile(member)
    if handle is None:
        raise UnsafeArchiveError(f"entry {member.name!r} has no data; refusing to unpack")
    return handle.read()
