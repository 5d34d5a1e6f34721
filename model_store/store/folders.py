"""Version folders bound to what the history recorded: name, version and digest, read from the folder itself.

A version folder ``versions/V/`` holds ``published.json`` (the record) and
``bundle/`` (with its manifest). Three things name the version and its
content, and all of them must agree with the publish entry of the verified
trail: the folder name, the record (``version``, ``digest``,
``publish_seq``) and the manifest (``name``, ``version``, and its digest,
the SHA-256 of its canonical JSON). Swapping two folders, copying one over
another, renaming one or adding one by hand breaks one of these links,
whatever signatures the bundles carry. Array checksums are fixed by the
manifest, so they are checked where arrays are read (every load and
activation), not here.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import HistoryError, NotFoundError, RbfgateError
from model_store.manifest import MANIFEST_FILE, parse_manifest_bytes
from model_store.store.files import UnsafeStoreEntry, check_tree, read_store_file, store_entry_kind
from model_store.store.layout import StoreLayout, stray_entries, version_names
from model_store.store.publishing import VersionRecord, read_record

__all__ = ["StoredVersion", "binding_problem", "folder_fingerprint", "read_stored_version", "read_stored_versions"]

_RESTORE = "restore the version folder from a backup and investigate who changed it"


@dataclass(frozen=True)
class StoredVersion:
    """What one folder under ``versions/`` says about itself; ``problem`` when it cannot be read as a version."""

    folder: str
    record: VersionRecord | None
    manifest_name: str | None = None
    manifest_version: str | None = None
    manifest_digest: str | None = None
    problem: str | None = None


def read_stored_version(layout: StoreLayout, name: str, folder: str) -> StoredVersion:
    """Read the record and the manifest of ``versions/folder`` without following links."""
    try:
        record = read_record(layout, name, folder)
    except (UnsafeStoreEntry, NotFoundError) as exc:
        return StoredVersion(folder, None, problem=str(exc))
    bundle = layout.bundle(name, folder)
    try:
        check_tree(layout.root, layout.version(name, folder), subdirectories=frozenset({"bundle"}))
        check_tree(layout.root, bundle)
        data = read_store_file(layout.root, bundle / MANIFEST_FILE)
        if data is None:
            return StoredVersion(folder, record, problem=f"{bundle / MANIFEST_FILE}: missing")
        document, manifest = parse_manifest_bytes(data, source=str(bundle / MANIFEST_FILE))
    except RbfgateError as exc:
        return StoredVersion(folder, record, problem=str(exc))
    return StoredVersion(folder, record, manifest.name, manifest.version, sha256_bytes(canonical_json(document)))


def read_stored_versions(layout: StoreLayout, name: str) -> list[StoredVersion]:
    """Every folder under ``versions/`` of ``name``; call it holding the lock (no prune in between).

    ``HistoryError`` when ``versions/`` is not the model's own directory or holds an entry no version can be
    named: both were put there by hand.
    """
    versions = layout.versions(name)
    try:
        if store_entry_kind(layout.root, versions) == "file":
            raise UnsafeStoreEntry(f"{versions}: is a file where the directory of the versions belongs")
    except UnsafeStoreEntry as exc:
        raise HistoryError(f"history of {name}: {exc}") from exc
    stray = stray_entries(layout, name)
    if stray:
        raise HistoryError(
            f"history of {name}: versions/{stray[0]} cannot be a version (expected a version name: 1 to 64 characters "
            f"of A-Z a-z 0-9 . _ -, starting with a letter or digit), so it was added by hand; remove it"
        )
    return [read_stored_version(layout, name, folder) for folder in version_names(layout, name)]


def binding_problem(model: str, stored: StoredVersion) -> HistoryError | None:
    """The error naming how ``stored`` disagrees with itself, or None when folder, record and manifest agree."""
    where = f"history of {model}: version folder versions/{stored.folder}"
    if stored.problem is not None:
        return HistoryError(f"{where} cannot be read as a stored version ({stored.problem}); {_RESTORE}")
    record = stored.record
    if record.version != stored.folder or record.name != model:
        return HistoryError(
            f"{where} holds the record of {record.name} {record.version} (publish seq {record.publish_seq}); "
            f"version folders were swapped, copied or renamed by hand; {_RESTORE}"
        )
    if (stored.manifest_name, stored.manifest_version) != (model, stored.folder):
        return HistoryError(
            f"{where} holds the bundle of {stored.manifest_name} {stored.manifest_version}; bundles were swapped or "
            f"copied between version folders by hand; {_RESTORE}"
        )
    if stored.manifest_digest != record.digest:
        return HistoryError(
            f"{where}: its manifest's digest is {stored.manifest_digest[:16]}..., but it was published with "
            f"{record.digest[:16]}...; the stored bundle was altered or replaced; {_RESTORE}"
        )
    return None


def folder_fingerprint(layout: StoreLayout, name: str, version: str) -> tuple:
    """What ``lstat`` says of the entries the binding check reads (the version folder, its record, its bundle
    folder and manifest, the model's trail): inode, size, and modification and change times in ns.

    For a reader that re-checks a live version often (the service's poll): the binding needs checking again
    only when this changes. A rename, a copy over a file or an edit changes an inode or a change time, which
    no user can set back (the kernel sets ``st_ctime`` on every change of the entry).
    """
    paths = (layout.version(name, version), layout.record(name, version), layout.bundle(name, version),
             layout.bundle(name, version) / MANIFEST_FILE, layout.history(name))
    states = []
    for path in paths:
        try:
            found = os.lstat(path)
        except OSError:
            states.append(None)
            continue
        states.append((found.st_dev, found.st_ino, found.st_mode, found.st_size, found.st_mtime_ns, found.st_ctime_ns))
    return tuple(states)
