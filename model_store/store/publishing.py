"""Copying a verified bundle into the store: staging, the version record, the final rename.

A version is assembled in ``STORE/staging/<random>/`` (``published.json``
plus ``bundle/``), every file and directory fsynced, re-read and checked
against the digest that was verified, and only then renamed to
``models/NAME/versions/VERSION``. A publisher killed at any moment leaves at
most a staging directory, which no reader looks at and the next change to
the store removes.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

from model_store.archive import is_archive, read_archive
from model_store.bundle import Bundle, load_bundle
from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import IntegrityError, NotFoundError, RbfgateError, StoreError
from model_store.manifest import MANIFEST_FILE, SIGNATURE_FILE, parse_manifest_bytes
from model_store.store.durable import fsync_directory, fsync_tree, temporary_name
from model_store.store.files import check_work_entry, read_store_file
from model_store.store.layout import StoreLayout, version_names

__all__ = [
    "PublishOutcome",
    "VersionRecord",
    "bundle_members",
    "claimed_identity",
    "clear_staging",
    "discard_version",
    "read_record",
    "read_records",
    "stage_version",
]

# Progress hook: called with "staging <file>", "staged", "stored", "recorded" as publishing advances.
StepHook = Callable[[str], None]


@dataclass(frozen=True)
class PublishOutcome:
    name: str
    version: str
    digest: str
    already_present: bool


@dataclass(frozen=True)
class VersionRecord:
    """``published.json``: what was stored, when and by whom; ``publish_seq`` orders versions.

    ``published_via`` (cli, http, python) is absent from records written before it existed.
    """

    name: str
    version: str
    digest: str
    created: str
    published_at: str
    published_by: str
    publish_seq: int
    published_via: str | None = None


def read_record(layout: StoreLayout, name: str, version: str) -> VersionRecord:
    """The version record, read without following links; ``NotFoundError`` when the version is gone."""
    path = layout.record(name, version)
    data = read_store_file(layout.root, path)  # UnsafeStoreEntry for a link: callers say what it means to them
    if data is None:
        raise NotFoundError(f"{path}: no version record; the version was removed or was not stored by rbfgate")
    try:
        document = json.loads(data.decode("utf-8"))
        record = VersionRecord(**document)
        if type(record.publish_seq) is not int or not all(
            isinstance(value, str) for value in (record.version, record.digest, record.published_at, record.published_by)
        ):
            raise TypeError("publish_seq must be a whole number and the other fields text")
        return record
    except (ValueError, TypeError) as exc:
        raise StoreError(f"{path}: the version record is malformed ({exc}); restore it from a backup") from exc


def read_records(layout: StoreLayout, name: str) -> list[VersionRecord]:
    """The records of every stored version of ``name``; call it holding the lock (no prune in between)."""
    return [read_record(layout, name, version) for version in version_names(layout, name)]


def claimed_identity(source: Path) -> tuple[str, str, str] | None:
    """``(name, version, digest)`` as the manifest of ``source`` states them, or None if it cannot be read.

    For recording a publish refused because the bundle failed its checksums or
    golden self-test: the manifest parsed, though the bundle as a whole did not verify.
    """
    source = Path(source)
    try:
        data = read_archive(source)[MANIFEST_FILE] if is_archive(source) else (source / MANIFEST_FILE).read_bytes()
        document, manifest = parse_manifest_bytes(data, source=str(source))
    except (RbfgateError, OSError, KeyError):
        return None
    return manifest.name, manifest.version, sha256_bytes(canonical_json(document))


def bundle_members(source: Path, bundle: Bundle) -> dict[str, bytes]:
    """The bytes to store: the manifest, the files it lists, and the signature when there is one."""
    source = Path(source)
    if is_archive(source):
        return read_archive(source)
    names = [MANIFEST_FILE, *bundle.manifest.files]
    members = {name: _read(source / name) for name in names}
    signature = source / SIGNATURE_FILE
    if signature.is_file():
        members[SIGNATURE_FILE] = _read(signature)
    return members


def stage_version(
    staging_root: Path, record: VersionRecord, members: dict[str, bytes], step: StepHook
) -> Path:
    """Write the version into a fresh staging directory, fsync it, and check it still has ``record.digest``."""
    _ensure_staging(staging_root)
    staged = staging_root / temporary_name(f"{record.name}-{record.version}")
    bundle_dir = staged / "bundle"
    bundle_dir.mkdir(parents=True)
    for name, data in members.items():
        step(f"staging {name}")
        (bundle_dir / name).write_bytes(data)
    (staged / "published.json").write_text(json.dumps(asdict(record), indent=2, sort_keys=True) + "\n", "utf-8")
    fsync_tree(staged)
    try:
        copy = load_bundle(bundle_dir)
    except RbfgateError as exc:
        raise IntegrityError(
            f"the copy of {record.name} {record.version} in the store does not verify ({exc}); "
            "the bundle changed while it was being published, publish it again"
        ) from exc
    if copy.digest != record.digest:
        raise IntegrityError(
            f"{record.name} {record.version}: the bundle's digest changed from {record.digest[:16]}... to "
            f"{copy.digest[:16]}... while it was being published; publish it again once it is stable"
        )
    step("staged")
    return staged


def clear_staging(staging_root: Path) -> list[str]:
    """Remove what interrupted publishers and pruners left; call only while holding the store lock."""
    if _staging_kind(staging_root) is None:
        return []
    leftovers = sorted(os.listdir(staging_root))
    for name in leftovers:
        path = staging_root / name
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        else:
            path.unlink()
    if leftovers:
        fsync_directory(staging_root)
    return leftovers


def discard_version(version_dir: Path, staging_root: Path) -> None:
    """Take a version out of the store with one rename (readers see it or not), then delete it."""
    _ensure_staging(staging_root)
    doomed = staging_root / temporary_name(f"pruned-{version_dir.name}")
    os.rename(version_dir, doomed)
    fsync_directory(version_dir.parent)
    shutil.rmtree(doomed)


def _staging_kind(staging_root: Path) -> str | None:
    """"directory", or None when missing; refuses a link or anything else in its place (``files.check_work_entry``).

    Everything under staging/ is deleted by the next change, so staging/ must be
    the store's own directory: a link there would make rbfgate delete (and
    write) the contents of whatever directory it points to.
    """
    return "directory" if check_work_entry(staging_root) else None


def _ensure_staging(staging_root: Path) -> None:
    if _staging_kind(staging_root) is None:
        staging_root.mkdir()


def _read(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise IntegrityError(f"{path}: cannot be read while publishing ({exc.strerror}); the bundle changed") from exc
